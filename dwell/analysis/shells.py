"""Passes and in-view counts of circular shells (isotropic or of one inclination) at any
latitude, on a rotating or a frozen Earth; several shells combine.

Model (derivations in ``docs/inclined-shells.md``): each shell is N satellites on circular
orbits of one radius ``r`` and angular rate ``omega``, either with uniformly random orbit
normals (``inclination_deg=None``, isotropic) or all at inclination ``i`` with node longitudes
spread uniformly relative to the terminal (a Walker shell's nodes, or any nodes averaged by the
Earth's rotation over a long run); each satellite's phase uniform.  The terminal stands on a
sphere at geocentric latitude ``lat_deg``; it sees a satellite when the Earth-central angle
between them is below ``psi0`` (the visibility cap, :func:`dwell.analysis.analytic.
cap_half_angle_rad`); the Earth turns at ``earth_rate_rad_s`` (0 for a frozen Earth).

- mean number in view: the latitude density over the cap (``analytic.walker_mean_in_view``) or
  the cap's area fraction (isotropic);
- pass rate: the flux of satellites through the cap's boundary in the Earth-fixed frame, where
  a satellite at latitude ``phi`` on an orbit of inclination ``i`` moves east at
  ``omega cos i / cos phi - Omega cos phi`` and north at ``+-omega sqrt(cos^2 phi - cos^2 i) /
  cos phi``, the two signs (ascending and descending) equally often;
- mean pass duration: mean in view over pass rate (Little's law);
- in-view count: exact binomial for an isotropic shell, a Poisson law of the same mean for an
  inclined shell (APPROXIMATION: a Walker shell's satellites are placed regularly, so its count
  varies much less than a Poisson count), independent shells convolved.

Cost: the pass rate of an inclined shell is one vectorised quadrature along the cap's boundary
(about a millisecond); everything else is O(1) or one short quadrature.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.integrate import quad
from scipy.stats import binom, poisson

from .analytic import cap_half_angle_rad, isotropic_mean_in_view, walker_mean_in_view


@dataclass(frozen=True)
class Shell:
    """One shell: ``n_sat`` satellites at ``orbit_radius_km`` moving at ``omega_rad_s``
    (inertial rate along the orbit); ``inclination_deg`` None for an isotropic shell."""

    n_sat: int
    orbit_radius_km: float
    omega_rad_s: float
    inclination_deg: float | None = None

    @property
    def isotropic(self) -> bool:
        return self.inclination_deg is None


@dataclass(frozen=True)
class Site:
    """The terminal as the formulas see it: geocentric latitude (deg), distance from the
    Earth's centre (km), elevation floor (deg) and the Earth's rotation rate (rad/s, 0 =
    frozen)."""

    lat_deg: float
    radius_km: float
    floor_deg: float
    earth_rate_rad_s: float = 0.0

    def psi0(self, shell: Shell) -> float:
        """Half-angle (rad) of the visibility cap for this shell."""
        return float(cap_half_angle_rad(self.floor_deg, shell.orbit_radius_km, self.radius_km))


# ---- one shell --------------------------------------------------------------------------------

@lru_cache(maxsize=4096)    # pure in its frozen arguments: an area's rows share a latitude
def mean_in_view(shell: Shell, site: Site) -> float:
    """Time-averaged number of the shell's satellites in view.  Cost: O(1) isotropic, one
    quadrature inclined (once per shell and site: cached)."""
    psi0 = site.psi0(shell)
    if shell.isotropic:
        return float(isotropic_mean_in_view(shell.n_sat, psi0))
    return walker_mean_in_view(shell.n_sat, shell.inclination_deg, site.lat_deg, psi0)


def _inward_mean(s: np.ndarray | float, omega: float) -> np.ndarray:
    """``E[(omega cos(alpha) + s)_+]`` for alpha uniform: ``(sqrt(omega^2 - s^2) +
    s arccos(-s/omega)) / pi`` when ``|s| <= omega`` (``s`` when above, 0 when below)."""
    s = np.asarray(s, dtype=float)
    c = np.clip(s / omega, -1.0, 1.0)
    inside = (np.sqrt(np.maximum(omega * omega - s * s, 0.0)) + s * np.arccos(-c)) / math.pi
    return np.where(s >= omega, s, np.where(s <= -omega, 0.0, inside))


def isotropic_pass_rate_per_s(n_sat: int, psi0: float, omega_rad_s: float,
                              terminal_lat_deg: float = 0.0, earth_rate_rad_s: float = 0.0
                              ) -> float:
    """Pass starts per second of an isotropic shell seen from a terminal the Earth carries.

    Satellite directions are uniform (density ``N / (4 pi)``) with uniform headings at rate
    ``omega``; in the Earth-fixed frame each also drifts west at ``Omega cos(latitude)``.  At
    the cap-boundary point of bearing ``a`` that drift has inward component ``s(a) = Omega
    cos(lat_T) sin(a)`` (the terminal's own velocity projected on the boundary normal), so the
    inward flux per unit boundary length is ``N / (4 pi) E[(omega cos alpha + s)_+]`` and the
    rate ``N sin(psi0) / (4 pi) int_0^2pi E[(omega cos alpha + s(a))_+] da``.  With no rotation
    it is ``N omega sin(psi0) / (2 pi)`` (:func:`dwell.analysis.analytic.isotropic_pass_rate_per_s`);
    rotation adds only ``(Omega cos lat)^2 / (4 omega^2)`` to first order.  Cost: one
    quadrature (none when frozen).
    """
    n = float(n_sat)
    drift = float(earth_rate_rad_s) * math.cos(math.radians(terminal_lat_deg))
    if drift == 0.0:
        return n * omega_rad_s * math.sin(psi0) / (2.0 * math.pi)
    val, _ = quad(lambda a: float(_inward_mean(drift * math.sin(a), omega_rad_s)), 0.0,
                  2.0 * math.pi, limit=200, epsabs=0.0, epsrel=1e-11)
    return n * math.sin(psi0) / (4.0 * math.pi) * val


_GL_X, _GL_W = np.polynomial.legendre.leggauss(48)
_SCAN_POINTS = 4096


def _branch_inward_flux(a: np.ndarray, n: float, omega: float, big_omega: float, sin_i: float,
                        cos_i: float, lat_t: float, psi0: float) -> np.ndarray:
    """Inward flux per unit bearing (1/s/rad) of each branch (ascending, descending) at
    boundary bearings ``a``, signed (negative = outward), shape (2, len(a)); 0 where the
    boundary lies beyond latitude +-i."""
    c0, s0 = math.cos(psi0), math.sin(psi0)
    sl, cl = math.sin(lat_t), math.cos(lat_t)
    ca, sa = np.cos(a), np.sin(a)
    # P = c0 T + s0 d(a), nu = -s0 T + c0 d(a), with T = (cl, 0, sl), north_T = (-sl, 0, cl),
    # east_T = (0, 1, 0)
    p = np.stack([c0 * cl - s0 * ca * sl, s0 * sa, c0 * sl + s0 * ca * cl])
    nu = np.stack([-s0 * cl - c0 * ca * sl, c0 * sa, -s0 * sl + c0 * ca * cl])
    sin_phi = p[2]
    cos_phi = np.sqrt(np.maximum(1.0 - sin_phi * sin_phi, 0.0))
    ok = (np.abs(sin_phi) < sin_i) & (cos_phi > 1e-15)
    cos_phi = np.where(ok, cos_phi, 1.0)
    root = np.sqrt(np.where(ok, sin_i * sin_i - sin_phi * sin_phi, 1.0))  # sqrt(cos^2 phi - cos^2 i)
    rxy = np.hypot(p[0], p[1])
    rxy = np.where(rxy > 0, rxy, 1.0)
    cos_lon, sin_lon = p[0] / rxy, p[1] / rxy
    nu_e = -nu[0] * sin_lon + nu[1] * cos_lon
    nu_n = (-nu[0] * cos_lon - nu[1] * sin_lon) * sin_phi + nu[2] * cos_phi
    dens_v_north = n * omega / (4.0 * math.pi ** 2 * cos_phi)         # density x |north speed|
    dens_v_east = n * (omega * cos_i / cos_phi - big_omega * cos_phi) / (4.0 * math.pi ** 2 * root)
    out = np.stack([-(dens_v_north * nu_n + dens_v_east * nu_e),
                    -(-dens_v_north * nu_n + dens_v_east * nu_e)]) * s0
    return np.where(ok[None, :], out, 0.0)


def inclined_pass_rate_per_s(n_sat: int, inclination_deg: float, terminal_lat_deg: float,
                             psi0: float, omega_rad_s: float, earth_rate_rad_s: float = 0.0
                             ) -> float:
    """Pass starts per second of N circular orbits of inclination i (nodes uniform relative to
    the terminal), by the inward flux through the visibility cap's boundary.

    The boundary point of bearing ``a`` from the terminal T is ``P = cos(psi0) T + sin(psi0)
    d(a)`` with outward normal ``nu = -sin(psi0) T + cos(psi0) d(a)``, ``d(a) = cos(a) north_T +
    sin(a) east_T``, arc element ``sin(psi0) da``.  At P (latitude phi, ``|phi| < i``) each of
    the two branches (ascending, descending) has density ``N / (4 pi^2 sqrt(sin^2 i -
    sin^2 phi))`` per steradian and Earth-fixed velocity (east, north) = ``(omega cos i / cos
    phi - Omega cos phi, +-omega sqrt(cos^2 phi - cos^2 i) / cos phi)``; the rate is the
    integral over ``a`` of ``sum over branches of density * max(0, -velocity . nu)`` times the
    arc element.  Equatorial orbits (``i`` = 0 or 180 deg) pass ``|omega cos i - Omega| /
    (2 pi)`` times per second each when the cap meets the equator.

    Quadrature: break points where the boundary reaches latitude ``+-i`` (the density's
    integrable inverse square root) and where a branch's flux changes sign (kinks of the
    positive part, found on a 4096-point scan and refined by bisection); on each smooth piece
    a 48-point Gauss-Legendre rule after ``a = lo + (hi - lo)(1 - cos theta)/2``, which makes the
    square-root end points smooth.  Relative accuracy about 1e-9; cost about a millisecond.
    """
    n = float(n_sat)
    omega, big_omega = float(omega_rad_s), float(earth_rate_rad_s)
    inc = math.radians(inclination_deg)
    sin_i, cos_i = abs(math.sin(inc)), math.cos(inc)
    lat_t = math.radians(terminal_lat_deg)
    if psi0 <= 0.0 or n == 0.0:
        return 0.0
    if sin_i < 1e-12:
        relative = abs(omega * math.copysign(1.0, cos_i) - big_omega)
        return n * relative / (2.0 * math.pi) if abs(lat_t) < psi0 else 0.0
    args = (n, omega, big_omega, sin_i, cos_i, lat_t, psi0)
    points = [0.0, 2.0 * math.pi]
    den = math.sin(psi0) * math.cos(lat_t)
    if abs(den) > 1e-15:   # bearings where the boundary reaches latitude +-i
        for target in (sin_i, -sin_i):
            c = (target - math.cos(psi0) * math.sin(lat_t)) / den
            if -1.0 <= c <= 1.0:
                a = math.acos(c)
                points += [a, 2.0 * math.pi - a]
    # kinks: sign changes of each branch's flux, bracketed on a scan, refined by bisection
    scan = np.linspace(0.0, 2.0 * math.pi, _SCAN_POINTS + 1)
    g = _branch_inward_flux(scan, *args)
    for b in range(2):
        k = np.flatnonzero((g[b, :-1] * g[b, 1:] < 0.0))
        lo, hi = scan[k], scan[k + 1]
        glo = g[b, k]
        for _ in range(50):
            mid = 0.5 * (lo + hi)
            gm = _branch_inward_flux(mid, *args)[b]
            left = np.sign(gm) == np.sign(glo)
            lo, hi = np.where(left, mid, lo), np.where(left, hi, mid)
            glo = np.where(left, gm, glo)
        points += list(0.5 * (lo + hi))
    edges = np.unique(np.array(points))
    lo, hi = edges[:-1], edges[1:]
    keep = hi - lo > 1e-14
    lo, hi = lo[keep], hi[keep]
    theta = (_GL_X + 1.0) * (math.pi / 2.0)
    w = _GL_W * (math.pi / 2.0)
    a = lo[:, None] + (hi - lo)[:, None] * (1.0 - np.cos(theta))[None, :] / 2.0
    jac = (hi - lo)[:, None] / 2.0 * np.sin(theta)[None, :]
    f = np.maximum(_branch_inward_flux(a.ravel(), *args), 0.0).sum(axis=0).reshape(a.shape)
    return float(np.sum(f * jac * w[None, :]))


@lru_cache(maxsize=4096)
def pass_rate_per_s(shell: Shell, site: Site) -> float:
    """Pass starts per second of one shell at the site (isotropic or inclined form; cached
    per shell and site)."""
    psi0 = site.psi0(shell)
    if shell.isotropic:
        return isotropic_pass_rate_per_s(shell.n_sat, psi0, shell.omega_rad_s, site.lat_deg,
                                         site.earth_rate_rad_s)
    return inclined_pass_rate_per_s(shell.n_sat, shell.inclination_deg, site.lat_deg, psi0,
                                    shell.omega_rad_s, site.earth_rate_rad_s)


# ---- several shells -----------------------------------------------------------------------

def shells_mean_in_view(shells: list[Shell], site: Site) -> float:
    """Sum of the shells' mean numbers in view."""
    return float(sum(mean_in_view(s, site) for s in shells))


def shells_pass_rate_per_s(shells: list[Shell], site: Site) -> float:
    """Sum of the shells' pass rates (1/s)."""
    return float(sum(pass_rate_per_s(s, site) for s in shells))


def shells_mean_pass_duration_s(shells: list[Shell], site: Site) -> float:
    """Mean pass duration (s) over all shells: total mean in view over total pass rate
    (Little's law, L = lambda W, for the stationary in-view process).  NaN with no passes."""
    rate = shells_pass_rate_per_s(shells, site)
    return shells_mean_in_view(shells, site) / rate if rate > 0 else math.nan


def in_view_pmf(shells: list[Shell], site: Site, k_max: int | None = None) -> np.ndarray:
    """``P(k in view)`` for k = 0..k_max: binomial(N, cap fraction) per isotropic shell (exact),
    Poisson(mean in view) per inclined shell (APPROXIMATION, see the module docstring),
    convolved over shells (independent).  ``k_max`` defaults to the total satellite count
    (capped at mean + 12 sd + 20).  Cost: one convolution per shell, O(k_max^2)."""
    total_mean = shells_mean_in_view(shells, site)
    if k_max is None:
        k_max = int(min(sum(s.n_sat for s in shells),
                        total_mean + 12.0 * math.sqrt(total_mean + 1.0) + 20.0))
    k = np.arange(k_max + 1)
    out = np.zeros(k_max + 1)
    out[0] = 1.0
    for s in shells:
        if s.isotropic:
            q = (1.0 - math.cos(site.psi0(s))) / 2.0
            pmf = binom.pmf(k, s.n_sat, q)
        else:
            pmf = poisson.pmf(k, mean_in_view(s, site))
        out = np.convolve(out, pmf)[: k_max + 1]
    return out


def in_view_sd(shells: list[Shell], site: Site) -> float:
    """Standard deviation of the in-view count under :func:`in_view_pmf`'s laws:
    ``sqrt(sum N q (1 - q))`` isotropic plus ``sqrt(mean)`` per inclined shell (Poisson)."""
    var = 0.0
    for s in shells:
        m = mean_in_view(s, site)
        var += m * (1.0 - m / s.n_sat) if s.isotropic else m
    return math.sqrt(var)
