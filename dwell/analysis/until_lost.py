"""Handover rate of the until-lost rule (keep the serving satellite until it sets, then take the
highest one in view) on a shell with continuous coverage.

Every link ends when its satellite sets and, with coverage continuous, a handover follows, so
the rate is one over the mean dwell.  The dwell is the remaining visibility of the satellite
taken at the handover instant: the nearest (highest) satellite in view.

RENEWAL APPROXIMATION (derivation and its size in ``docs/inclined-shells.md``): the satellites
other than the one setting are treated as a fresh snapshot of the shell at each handover, so

    E[dwell] = E[remaining visibility of the nearest in-view satellite at a typical instant
                 | some satellite in view].

The snapshot expectation is exact for the model: isotropic satellites (binomial point
process, uniform headings) or satellites of one inclination with uniform nodes, where the
nearest satellite's law is binomial for independent satellites or Poisson (APPROXIMATION for a
Walker shell, whose satellites are placed regularly) with the latitude density.  Each
satellite's remaining visibility is found by propagating its ideal circular orbit against the
terminal turning with the Earth.  What the renewal step leaves out: the satellite that set was
itself the nearest when it was taken, so others were farther then; this thins receding
candidates at the next handover and lengthens dwells.  In Monte Carlo of independent
satellites the formula's dwell is 1-3 % short with 7-10 satellites in view and 0.3-1.1 %
short with about 20 (tests/test_until_lost.py), so the rate it gives is high by as much.

Cost: a few thousand orbit propagations of a few hundred samples each, vectorised (tens of
milliseconds), plus about forty quadratures of the mean-in-view function for inclined shells.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.interpolate import PchipInterpolator

from .analytic import walker_mean_in_view
from .shells import Shell, Site

_TIME_STEPS = 256


def exit_times_s(x: np.ndarray, e: np.ndarray, omega_rad_s: float, earth_rate_rad_s: float,
                 lat_deg: float, psi0: float) -> np.ndarray:
    """Time (s) until satellites at unit positions ``x`` (Earth-fixed at t = 0, shape (n, 3))
    moving along their circular orbits in the inertial direction ``e`` (unit, perpendicular to
    ``x``) leave the cap of half-angle ``psi0`` about a terminal at geocentric latitude
    ``lat_deg``, longitude 0, turning with the Earth at ``earth_rate_rad_s``.

    ``p(t) = cos(omega t) x + sin(omega t) e`` against ``T(t) = Rz(Omega t) T(0)``: first sample
    (of 256 up to an upper bound of the pass time) with ``p . T < cos psi0``, then two secant
    steps on the exact function.  Satellites already outside give 0.  Cost: O(n * 256)."""
    x = np.asarray(x, dtype=float)
    e = np.asarray(e, dtype=float)
    w, big = float(omega_rad_s), float(earth_rate_rad_s)
    lat = math.radians(lat_deg)
    c0 = math.cos(psi0)
    slowest = max(w - abs(big), 0.05 * w)
    t_max = 2.6 * psi0 / slowest + 1e-9
    t = np.linspace(0.0, t_max, _TIME_STEPS + 1)

    def excess(tt: np.ndarray, rows: np.ndarray | slice = slice(None)) -> np.ndarray:
        """cos(angle) - cos(psi0) at times tt (broadcast against the rows)."""
        tc, ts = np.cos(big * tt), np.sin(big * tt)
        term = [math.cos(lat) * tc, math.cos(lat) * ts, math.sin(lat) * np.ones_like(tt)]
        xs, es = x[rows], e[rows]
        xt = xs[..., 0] * term[0] + xs[..., 1] * term[1] + xs[..., 2] * term[2]
        et = es[..., 0] * term[0] + es[..., 1] * term[1] + es[..., 2] * term[2]
        return np.cos(w * tt) * xt + np.sin(w * tt) * et - c0

    g = excess(t[None, :], (slice(None), None))
    below = g < 0.0
    first = np.argmax(below, axis=1)
    never = ~below.any(axis=1)
    first = np.where(never, _TIME_STEPS, first)
    out = np.zeros(x.shape[0])
    live = (first > 0) & ~never
    k = first[live]
    rows = np.flatnonzero(live)
    ta, tb = t[k - 1], t[k]
    ga, gb = g[rows, k - 1], g[rows, k]
    for _ in range(2):   # secant steps inside the bracket
        tm = ta - ga * (tb - ta) / (gb - ga)
        gm = excess(tm, rows)
        pos = gm >= 0.0
        ta, ga = np.where(pos, tm, ta), np.where(pos, gm, ga)
        tb, gb = np.where(pos, tb, tm), np.where(pos, gb, gm)
    out[rows] = ta - ga * (tb - ta) / (gb - ga)
    out[never] = t_max
    return out


def _cosine_nodes(lo: float, hi: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on [lo, hi] after ``x = lo + (hi - lo)(1 - cos t)/2``
    (smooths square-root behaviour at both ends)."""
    gx, gw = np.polynomial.legendre.leggauss(n)
    t = (gx + 1.0) * (math.pi / 2.0)
    return (lo + (hi - lo) * (1.0 - np.cos(t)) / 2.0,
            gw * (math.pi / 2.0) * (hi - lo) / 2.0 * np.sin(t))


def _isotropic_mean_dwell_s(shell: Shell, site: Site, n_psi: int = 40, n_ang: int = 24) -> float:
    n = shell.n_sat
    psi0 = site.psi0(shell)
    lat = math.radians(site.lat_deg)
    psi, wpsi = np.polynomial.legendre.leggauss(n_psi)
    psi = (psi + 1.0) * psi0 / 2.0
    wpsi = wpsi * psi0 / 2.0
    # density of the nearest of N independent uniform points: N f(psi) S(psi)^(N-1)
    dens = n * np.sin(psi) / 2.0 * ((1.0 + np.cos(psi)) / 2.0) ** (n - 1)
    p_view = 1.0 - ((1.0 + math.cos(psi0)) / 2.0) ** n
    ang = np.arange(n_ang) * (2.0 * math.pi / n_ang)    # periodic: trapezoid rule
    if site.earth_rate_rad_s == 0.0:
        # closed form on a frozen Earth: distance to the orbit's closest point d, remaining arc
        # to the cap edge arccos(cos psi0 / cos d); the signed arc back to the closest point
        # averages to zero over the heading
        s2 = (np.sin(psi)[:, None] * np.sin(ang)[None, :]) ** 2
        arc = np.arccos(np.clip(math.cos(psi0) / np.sqrt(1.0 - s2), -1.0, 1.0))
        resid = arc.mean(axis=1) / shell.omega_rad_s
    else:
        t_vec = np.array([math.cos(lat), 0.0, math.sin(lat)])
        north = np.array([-math.sin(lat), 0.0, math.cos(lat)])
        east = np.array([0.0, 1.0, 0.0])
        P, B, H = np.meshgrid(psi, ang, ang, indexing="ij")      # distance, bearing, heading
        d = np.cos(B)[..., None] * north + np.sin(B)[..., None] * east
        perp = -np.sin(B)[..., None] * north + np.cos(B)[..., None] * east
        x = np.cos(P)[..., None] * t_vec + np.sin(P)[..., None] * d
        away = -np.sin(P)[..., None] * t_vec + np.cos(P)[..., None] * d
        e = np.cos(H)[..., None] * away + np.sin(H)[..., None] * perp
        r = exit_times_s(x.reshape(-1, 3), e.reshape(-1, 3), shell.omega_rad_s,
                         site.earth_rate_rad_s, site.lat_deg, psi0).reshape(P.shape)
        resid = r.mean(axis=(1, 2))
    return float(np.sum(wpsi * dens * resid) / p_view)


def _inclined_mean_dwell_s(shell: Shell, site: Site, independent: bool, n_u: int = 48,
                           n_lon: int = 32) -> float:
    n = shell.n_sat
    psi0 = site.psi0(shell)
    inc = math.radians(shell.inclination_deg)
    sin_i, cos_i = abs(math.sin(inc)), math.cos(inc)
    lat_t = math.radians(site.lat_deg)
    if sin_i < 1e-9:
        return math.nan
    lo = max(lat_t - psi0, -math.asin(sin_i))
    hi = min(lat_t + psi0, math.asin(sin_i))
    if lo >= hi:
        return math.nan
    # mean number within central angle psi (all branches), for the nearest satellite's law
    grid = psi0 * (1.0 - np.cos(np.linspace(0.0, math.pi, 41))) / 2.0
    m_grid = np.array([walker_mean_in_view(n, shell.inclination_deg, site.lat_deg, float(p))
                       for p in grid])
    m_of = PchipInterpolator(grid, m_grid)
    total_m = float(m_grid[-1])

    def u_of(lat: float) -> float:
        return math.asin(max(-1.0, min(1.0, math.sin(lat) / sin_i)))

    # pieces in u: where whole latitude circles start to lie inside the cap (cap over a pole)
    kinks = [u_of(x) for x in (math.pi - lat_t - psi0, -math.pi - lat_t + psi0) if lo < x < hi]
    edges = sorted({u_of(lo), u_of(hi), *kinks})
    us, wus = [], []
    for a, b in zip(edges[:-1], edges[1:]):
        uu, ww = _cosine_nodes(a, b, n_u)
        us.append(uu)
        wus.append(ww)
    u, wu = np.concatenate(us), np.concatenate(wus)
    sin_phi = sin_i * np.sin(u)
    cos_phi = np.sqrt(np.maximum(1.0 - sin_phi ** 2, 1e-300))
    num = math.cos(psi0) - sin_phi * math.sin(lat_t)
    den = np.maximum(cos_phi * math.cos(lat_t), 1e-300)
    half = np.arccos(np.clip(num / den, -1.0, 1.0))          # longitude half-width in the cap
    gx, gw = np.polynomial.legendre.leggauss(n_lon)
    lon = half[:, None] * gx[None, :]
    wlon = half[:, None] * gw[None, :]
    sp, cp = sin_phi[:, None] * np.ones_like(lon), cos_phi[:, None] * np.ones_like(lon)
    x = np.stack([cp * np.cos(lon), cp * np.sin(lon), sp], axis=-1)
    east = np.stack([-np.sin(lon), np.cos(lon), np.zeros_like(lon)], axis=-1)
    north = np.stack([-sp * np.cos(lon), -sp * np.sin(lon), cp], axis=-1)
    v_e = (cos_i / cp)[..., None]
    v_n = (np.sqrt(np.maximum(cp ** 2 - cos_i ** 2, 0.0)) / cp)[..., None]
    t_vec = np.array([math.cos(lat_t), 0.0, math.sin(lat_t)])
    psi = np.arccos(np.clip(x @ t_vec, -1.0, 1.0))
    m = np.clip(m_of(psi), 0.0, None)
    if independent:   # binomial: each other satellite farther with probability 1 - m/N
        void = np.clip(1.0 - m / n, 0.0, 1.0) ** (n - 1)
        p_view = 1.0 - (1.0 - total_m / n) ** n
    else:             # Poisson approximation
        void = np.exp(-m)
        p_view = 1.0 - math.exp(-total_m)
    acc = 0.0
    for sign in (1.0, -1.0):                                   # ascending, descending
        e = v_e * east + sign * v_n * north
        r = exit_times_s(x.reshape(-1, 3), e.reshape(-1, 3), shell.omega_rad_s,
                         site.earth_rate_rad_s, site.lat_deg, psi0).reshape(lon.shape)
        acc += float(np.sum(wu[:, None] * wlon * void * r))
    # uniform density N / (4 pi^2) per branch in (argument of latitude, longitude)
    return acc * n / (4.0 * math.pi ** 2) / p_view


def until_lost_mean_dwell_s(shell: Shell, site: Site, independent: bool = True) -> float:
    """Mean dwell (s) of the until-lost rule under the renewal approximation (module docstring):
    the mean remaining visibility of the nearest in-view satellite at a typical instant, given
    one is in view.  ``independent``: the nearest satellite's law is binomial (independent
    satellites: isotropic or random nodes); False uses the Poisson law (a Walker shell's
    APPROXIMATION).  Isotropic shells are always binomial.  NaN when the shell never reaches
    the cap.  Cost: tens of milliseconds."""
    if shell.isotropic:
        return _isotropic_mean_dwell_s(shell, site)
    return _inclined_mean_dwell_s(shell, site, independent)


def until_lost_handover_rate_per_s(shell: Shell, site: Site, independent: bool = True) -> float:
    """Handovers per second of the until-lost rule with continuous coverage: one over
    :func:`until_lost_mean_dwell_s` (renewal approximation)."""
    d = until_lost_mean_dwell_s(shell, site, independent)
    return 1.0 / d if d > 0 else math.nan
