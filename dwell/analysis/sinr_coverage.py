"""SINR coverage ``P(SINR > T)`` of nearest-satellite association on an isotropic shell.

Model (derivation in ``docs/sinr-coverage.md``): N independent satellites uniform on a shell
of radius r (binomial point process); the terminal is served by the nearest one (smallest
Earth-central angle psi, i.e. highest elevation); every satellite's received power, in units
of the noise power, is a deterministic function ``s(psi)`` of its central angle (one
nadir-pointed beam per satellite, the link budget of :class:`dwell.radio.link.LinkModel`);
every other satellite in view (``psi <= psi_c``) interferes with a fraction ``load`` of its
power on the same frequency (reuse 1):

    SINR = s(psi_0) G_0 / (1 + load * sum_{j != 0, psi_j <= psi_c} s(psi_j) G_j),

``G = 1`` without fading, ``G ~ Exp(1)`` independent for Rayleigh fading.  Given the nearest
satellite's angle x, the other N - 1 satellites are independent and uniform on the part of
the sphere farther than x (a property of the binomial process), so the interference is a sum
of N - 1 independent terms and its conditional characteristic function (Laplace transform) is
the (N - 1)-th power of one term's.

- Rayleigh fading: ``P(SINR > T | x) = exp(-T/s(x)) L_I(T/s(x) | x)`` with ``L_I(z | x) =
  [ (int_x^psi_c f(psi) / (1 + z load s(psi)) dpsi + S(psi_c)) / S(x) ]^(N - 1)``, ``f(psi) =
  sin(psi)/2``, ``S(psi) = (1 + cos psi)/2`` (Haenggi, Stochastic Geometry for Wireless
  Networks, 2012, ch. 5; Chiu, Stoyan, Kendall and Mecke, Stochastic Geometry and its
  Applications, 3rd ed., 2013, for the binomial process); one quadrature per node.
- No fading: ``P(SINR > T | x) = P(I < s(x)/T - 1 | x)``, the interference's conditional CDF by
  numerical inversion of its conditional characteristic function on a lattice (discrete Fourier
  inversion, the lattice form of the Gil-Pelaez formula): one interferer's law binned on a
  lattice of ``2^15`` points, its discrete Fourier transform raised to the power N - 1 and
  transformed back.
- Then ``P(SINR > T) = int_0^psi_c N f(x) S(x)^(N-1) P(SINR > T | x) dx`` (Gauss-Legendre over
  the nearest satellite's angle, on pieces between the local minima of s (a narrow beam's
  nulls) and, without fading, only where s(x) > T), divided by ``1 - S(psi_c)^N`` for the coverage *given a
  satellite in view* (what a simulation measures over served instants).

Cost: 64 nodes for a smooth s (16 per piece between nulls); without fading one real FFT of
2^15 points per node and threshold (about 0.1 s per threshold for a smooth s, seconds for a
pattern with many nulls), Rayleigh one 400-point quadrature per node.
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np

_N_X = 64          # Gauss-Legendre nodes over the nearest satellite's angle (one or two pieces)
_N_PIECE = 16      # ... per piece between the nulls of a narrow beam
_N_CELLS = 40000   # cells of cos(psi) for one interferer's law
_LATTICE = 2 ** 15


def snr_of_central_angle(link_params: dict, site_radius_km: float, orbit_radius_km: float
                         ) -> Callable[[np.ndarray], np.ndarray]:
    """``s(psi)``: linear SNR (received power over noise) of a satellite at Earth-central angle
    ``psi`` (rad) from the terminal, on a sphere (terminal at ``site_radius_km``, satellite at
    ``orbit_radius_km``), nadir-pointed beam.

    Geometry by :func:`dwell.orbits.look.look` (range, elevation) and
    :func:`dwell.radio.link.off_boresight_deg` (angle at the satellite between nadir and the
    terminal); power by ``LinkModel(link_params).budget(range_km, elevation_deg,
    off_boresight_deg)["snr_db"]``.  Cost: one vectorised budget per call."""
    from ..orbits.look import look
    from ..radio.link import LinkModel, off_boresight_deg

    model = LinkModel(link_params)
    big_r, r = float(site_radius_km), float(orbit_radius_km)

    def s(psi: np.ndarray) -> np.ndarray:
        psi = np.asarray(psi, dtype=float)
        sat = np.stack([r * np.cos(psi), r * np.sin(psi), np.zeros_like(psi)], axis=-1)
        site = np.array([big_r, 0.0, 0.0])
        basis = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]])  # east, north, up
        geo = look(sat, None, site, None, basis)
        theta = off_boresight_deg(sat, site)
        snr_db = model.budget(geo["range_km"], geo["elevation_deg"], theta)["snr_db"]
        return 10.0 ** (np.asarray(snr_db, dtype=float) / 10.0)

    return s


def isotropic_sinr_ccdf(threshold_db: np.ndarray | float, n_sat: int, psi_c: float,
                        snr: Callable[[np.ndarray], np.ndarray], load: float = 1.0,
                        fading: str = "none", given_in_view: bool = True) -> np.ndarray:
    """``P(SINR > T)`` for thresholds ``threshold_db`` (dB), model of the module docstring.

    ``snr``: the function ``s(psi)`` (linear, e.g. :func:`snr_of_central_angle`); ``psi_c``:
    the visibility cap's half-angle (rad); ``load`` in [0, 1]; ``fading``: ``"none"`` or
    ``"rayleigh"``; ``given_in_view``: condition on a satellite being in view (the fraction of
    served instants), else the unconditional probability (0 when none is in view).
    Cost: tens of milliseconds per threshold (see the module docstring)."""
    t_db = np.atleast_1d(np.asarray(threshold_db, dtype=float))
    thr = 10.0 ** (t_db / 10.0)
    n = int(n_sat)
    if n < 1 or psi_c <= 0.0:
        return np.zeros(np.shape(threshold_db))
    p_view = 1.0 - ((1.0 + math.cos(psi_c)) / 2.0) ** n
    if fading == "rayleigh":
        pieces = _split_at_minima(snr, [(0.0, psi_c)])
        x, wx = _gauss_pieces(pieces, _N_X if len(pieces) <= 2 else _N_PIECE)
        wx = wx * _nearest_density(x, n)
        out = np.sum(wx[:, None] * _rayleigh_conditional(thr, x, n, psi_c, snr, load), axis=0)
    elif fading == "none":
        out = _plain_coverage(thr, n, psi_c, snr, load)
    else:
        raise ValueError(f"unknown fading {fading!r} (none, rayleigh)")
    if given_in_view:
        out = out / p_view
    return out.reshape(np.shape(threshold_db))


def _nearest_density(x: np.ndarray, n: int) -> np.ndarray:
    """Density of the nearest of N uniform satellites' central angle: N f(x) S(x)^(N-1)."""
    return n * np.sin(x) / 2.0 * ((1.0 + np.cos(x)) / 2.0) ** (n - 1)


def _gauss_pieces(pieces: list[tuple[float, float]], nodes: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights over a union of intervals."""
    xs, ws = [], []
    gx, gw = np.polynomial.legendre.leggauss(nodes)
    for lo, hi in pieces:
        xs.append(lo + (hi - lo) * (gx + 1.0) / 2.0)
        ws.append(gw * (hi - lo) / 2.0)
    if not xs:
        return np.zeros(0), np.zeros(0)
    return np.concatenate(xs), np.concatenate(ws)


def _where_above(snr: Callable, psi_c: float, level: float, grid_points: int = 4097
                 ) -> list[tuple[float, float]]:
    """Intervals of [0, psi_c] where s(psi) > level: sign changes on a grid, bisected."""
    grid = np.linspace(0.0, psi_c, grid_points)
    above = np.asarray(snr(grid), dtype=float) > level
    edges = np.flatnonzero(above[1:] != above[:-1])
    cuts = []
    for k in edges:
        lo, hi = grid[k], grid[k + 1]
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            if (float(snr(np.array([mid]))[0]) > level) == above[k]:
                lo = mid
            else:
                hi = mid
        cuts.append(0.5 * (lo + hi))
    bounds = [0.0, *cuts, psi_c]
    state = bool(above[0])
    pieces = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        if state and b > a:
            pieces.append((a, b))
        state = not state
    return pieces


def _split_at_minima(snr: Callable, pieces: list[tuple[float, float]], grid_points: int = 4097
                     ) -> list[tuple[float, float]]:
    """Cut intervals at the local minima of s(psi) found on a grid (the nulls of a narrow
    beam's pattern), so each piece's integrand is smooth enough for Gauss-Legendre."""
    if not pieces:
        return []
    grid = np.linspace(pieces[0][0], pieces[-1][1], grid_points)
    sg = np.asarray(snr(grid), dtype=float)
    minima = grid[1:-1][(sg[1:-1] < sg[:-2]) & (sg[1:-1] <= sg[2:])]
    out = []
    for lo, hi in pieces:
        cuts = [lo, *minima[(minima > lo) & (minima < hi)], hi]
        out += [(a, b) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]
    return out


def _rayleigh_conditional(thr, x, n, psi_c, snr, load) -> np.ndarray:
    """exp(-T/s(x)) L_I(T/s(x) | x) per node x and threshold T, shape (nodes, thresholds)."""
    s_x = np.asarray(snr(x), dtype=float)
    s_out = (1.0 + math.cos(psi_c)) / 2.0        # P(one satellite out of view)
    s_gt = (1.0 + np.cos(x)) / 2.0               # P(one satellite farther than x)
    gx, gw = np.polynomial.legendre.leggauss(400)
    # int_x^psi_c f(psi) g(psi) dpsi = (1/2) int_{cos psi_c}^{cos x} g du, u = cos psi
    lo, hi = math.cos(psi_c), np.cos(x)
    u = lo + (hi - lo)[:, None] * (gx[None, :] + 1.0) / 2.0          # (nodes, 400)
    wu = gw[None, :] * (hi - lo)[:, None] / 4.0
    s_u = np.asarray(snr(np.arccos(np.clip(u, -1.0, 1.0)).ravel()), dtype=float).reshape(u.shape)
    z = thr[None, :] / s_x[:, None]                                    # (nodes, thresholds)
    inner = np.einsum("nq,nqt->nt", wu, 1.0 / (1.0 + load * z[:, None, :] * s_u[:, :, None]))
    return np.exp(-z) * ((inner + s_out) / s_gt[:, None]) ** (n - 1)


def _plain_coverage(thr: np.ndarray, n: int, psi_c: float, snr: Callable, load: float
                    ) -> np.ndarray:
    """int N f(x) S(x)^(N-1) P(I < s(x)/T - 1 | x) dx per threshold, by lattice Fourier
    inversion of the interference's conditional characteristic function.  The conditional
    coverage jumps to 0 where s(x) falls to T (a satellite alone no longer clears T while the
    chance of no interferer is positive), so the x-integral runs over the pieces where
    s(x) > T."""
    s_out = (1.0 + math.cos(psi_c)) / 2.0
    # one interferer: u = cos(psi) uniform with density 1/2 on [-1, 1]; in view for u >= cos psi_c
    u_lo = math.cos(psi_c)
    du = (1.0 - u_lo) / _N_CELLS
    u_mid = u_lo + (np.arange(_N_CELLS) + 0.5) * du
    z_cell = load * np.asarray(snr(np.arccos(u_mid)), dtype=float)
    s_max = float(np.max(snr(np.linspace(0.0, psi_c, 4097))))
    # lattice extent: beyond every threshold's need and the interference's bulk (mean + 12 sd
    # for the nearest at the zenith, the largest case), so wrap-around mass is negligible
    mean1 = float(np.sum(z_cell) * du / 2.0)
    var1 = float(np.sum(z_cell ** 2) * du / 2.0) - mean1 ** 2
    bulk = (n - 1) * mean1 + 12.0 * math.sqrt(max((n - 1) * var1, 0.0)) + 2.0 * float(z_cell.max())
    extent = 1.05 * max(s_max / float(thr.min()), bulk, 1e-300)
    delta = extent / (_LATTICE // 2)          # half the lattice is zero padding
    k_cell = np.rint(z_cell / delta).astype(np.int64)
    out = np.zeros(thr.size)
    for j, level in enumerate(thr):
        pieces = _split_at_minima(snr, _where_above(snr, psi_c, float(level)))
        x, wx = _gauss_pieces(pieces, _N_X if len(pieces) <= 2 else _N_PIECE)
        if x.size == 0:
            continue
        wx = wx * _nearest_density(x, n)
        s_x = np.asarray(snr(x), dtype=float)
        s_gt = (1.0 + np.cos(x)) / 2.0
        y_need = np.maximum(s_x / level - 1.0, 0.0)
        cond = np.zeros(x.size)
        for i, xi in enumerate(x):
            farther = u_mid < math.cos(xi)    # cells farther than the nearest satellite
            pmf = np.bincount(k_cell[farther], minlength=_LATTICE)[:_LATTICE] * (du / 2.0)
            pmf = pmf / s_gt[i]
            atom1 = s_out / s_gt[i]           # one satellite out of view: no interference
            pmf[0] += atom1
            law = np.clip(np.fft.irfft(np.fft.rfft(pmf) ** (n - 1), _LATTICE), 0.0, None)
            cdf = np.cumsum(law)              # P(I <= k delta)
            atom = min(atom1, 1.0) ** (n - 1)  # no other satellite in view: I = 0
            # lattice point k carries the mass of [(k - 1/2) delta, (k + 1/2) delta), spread
            # evenly (the atom at 0 excepted): P(I < y) linear inside y's cell
            pos = y_need[i] / delta + 0.5
            k = min(int(pos), _LATTICE - 1)
            frac = pos - k
            if k == 0:
                cond[i] = atom + frac * (law[0] - atom)
            else:
                cond[i] = cdf[k - 1] + frac * law[k]
        out[j] = float(np.sum(wx * np.clip(cond, 0.0, 1.0)))
    return out
