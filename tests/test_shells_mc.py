"""Passes and in-view counts of inclined and isotropic circular shells on a rotating Earth
(dwell.analysis.shells, docs/inclined-shells.md) against Monte Carlo of ideal circular orbits
propagated here (not SGP4, not dwell's simulator)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from dwell.analysis import analytic as A
from dwell.analysis import shells as S


def _orbits(rng: np.random.Generator, m: int, inclination_deg: float | None
            ) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal (n1, n2) per satellite: position at argument of latitude u is
    cos(u) n1 + sin(u) n2 (inertial; textbook elements-to-Cartesian rotation, node uniform),
    the phase drawn separately.  ``None``: uniformly random orbit normals (isotropic)."""
    if inclination_deg is None:
        inc = np.arccos(rng.uniform(-1.0, 1.0, m))   # uniform normals: cos(i) uniform
    else:
        inc = np.full(m, math.radians(inclination_deg))
    node = rng.uniform(0.0, 2 * np.pi, m)
    n1 = np.stack([np.cos(node), np.sin(node), np.zeros(m)], axis=1)
    n2 = np.stack([-np.sin(node) * np.cos(inc), np.cos(node) * np.cos(inc), np.sin(inc)], axis=1)
    return n1, n2


def _passes_mc(inclination_deg, lat_deg, psi0, earth_rate, m, seed, orbits=4,
               steps_per_orbit=512):
    """Independent satellites (omega = 1) and a terminal turning with the Earth at
    ``earth_rate``: per-satellite pass-start counts over ``orbits`` revolutions, and the
    durations of passes that start in the first 2/3 of the span (all of them end inside it),
    crossing instants interpolated linearly between samples."""
    rng = np.random.default_rng(seed)
    n1, n2 = _orbits(rng, m, inclination_deg)
    u0 = rng.uniform(0.0, 2 * np.pi, m)
    span = orbits * 2 * np.pi
    h = 2 * np.pi / steps_per_orbit
    t = np.arange(0.0, span + h / 2, h)
    lat = math.radians(lat_deg)
    term = np.stack([np.cos(lat) * np.cos(earth_rate * t), np.cos(lat) * np.sin(earth_rate * t),
                     np.full(t.shape, np.sin(lat))], axis=1)
    counts = np.zeros(m)
    durations = []
    for idx in np.array_split(np.arange(m), max(1, m // 250)):
        u = u0[idx, None] + t[None, :]
        c = (np.cos(u) * (n1[idx] @ term.T) + np.sin(u) * (n2[idx] @ term.T)) - math.cos(psi0)
        inside = c >= 0
        start = inside[:, 1:] & ~inside[:, :-1]
        end = ~inside[:, 1:] & inside[:, :-1]
        counts[idx] = start.sum(axis=1)
        # crossing instants by linear interpolation of cos(angle) - cos(psi0)
        si, sk = np.nonzero(start)
        ei, ek = np.nonzero(end)
        ts = t[sk] + h * c[si, sk] / (c[si, sk] - c[si, sk + 1])
        te = t[ek] + h * c[ei, ek] / (c[ei, ek] - c[ei, ek + 1])
        # pair each start with the next end of the same satellite
        order_s = np.lexsort((ts, si))
        order_e = np.lexsort((te, ei))
        si, ts = si[order_s], ts[order_s]
        ei, te = ei[order_e], te[order_e]
        pos = np.searchsorted(ei * (span + 10) + te, si * (span + 10) + ts)
        ok = (pos < ei.size) & (ts < span * 2 / 3)
        ok[ok] &= ei[pos[ok]] == si[ok]
        durations.append(te[pos[ok]] - ts[ok])
    return counts / span, np.concatenate(durations)


CASES = [
    # (inclination, geocentric latitude, psi0, Earth rate / omega)
    (53.0, 40.0, 0.3, 0.2),      # mid latitude, strong rotation
    (97.0, 70.0, 0.25, 0.066),   # retrograde, LEO-like rotation ratio
    (50.0, 55.0, 0.25, 0.1),     # cap straddles the orbits' highest latitude
    (65.0, 0.0, 0.2, 0.3),       # equatorial terminal
]


@pytest.mark.parametrize("incl, lat, psi0, ratio", CASES)
def test_inclined_pass_rate_and_duration_against_circular_orbits(incl, lat, psi0, ratio):
    # Flux of satellites through the cap boundary in the Earth-fixed frame (docs/
    # inclined-shells.md) and Little's law for the duration.  Monte Carlo: independent
    # satellites of inclination i with uniform node and phase (so node longitudes are uniform
    # relative to the terminal, the formula's assumption), ideal circular motion, a terminal
    # turning at `ratio` times the orbital rate.
    n_sat = 100
    rate_per_sat, dur = _passes_mc(incl, lat, psi0, ratio, 6000, seed=int(incl + lat))
    want = S.inclined_pass_rate_per_s(n_sat, incl, lat, psi0, 1.0, ratio)
    got = n_sat * rate_per_sat.mean()
    # Monte Carlo error: satellites are independent; 5 standard errors of the mean count.
    # Sampling step 2 pi / 512: only passes shorter than one step can be missed; a chord of
    # length < delta has chance ~ delta^2 / (8 psi0^2) (planar chord law), below 1e-3 here
    # for delta = one step at up to 1.3x the orbital rate.
    se = n_sat * rate_per_sat.std(ddof=1) / math.sqrt(rate_per_sat.size)
    assert abs(got - want) < 5 * se + 1e-3 * want
    # mean duration: Little's law, mean in view / pass rate; 5 standard errors of the mean of
    # the Monte Carlo passes (linear interpolation of the crossings: error O(step^2)).
    want_dur = A.walker_mean_in_view(n_sat, incl, lat, psi0) / want
    assert abs(dur.mean() - want_dur) < 5 * dur.std(ddof=1) / math.sqrt(dur.size)


def test_rotation_changes_the_inclined_pass_rate_measurably():
    # The formula must see the Earth's rotation: at 53 deg inclination from 40 deg latitude the
    # eastward drift of the orbits relative to the ground changes the rate by several percent
    # at a rotation ratio of 0.2 (far above the Monte Carlo error of the test above, ~1 %).
    frozen = S.inclined_pass_rate_per_s(100, 53.0, 40.0, 0.3, 1.0, 0.0)
    turning = S.inclined_pass_rate_per_s(100, 53.0, 40.0, 0.3, 1.0, 0.2)
    assert abs(turning / frozen - 1) > 0.03


@pytest.mark.parametrize("lat, psi0, ratio", [(30.0, 0.35, 0.5), (75.0, 0.2, 0.3)])
def test_isotropic_pass_rate_rotating_against_circular_orbits(lat, psi0, ratio):
    # Isotropic shell, rotating Earth: N sin(psi0)/(4 pi) int E[(cos alpha + s(a))_+] da
    # (docs/inclined-shells.md).  Monte Carlo as above with uniformly random orbit normals.
    n_sat = 100
    rate_per_sat, dur = _passes_mc(None, lat, psi0, ratio, 6000, seed=int(lat * 10))
    want = S.isotropic_pass_rate_per_s(n_sat, psi0, 1.0, lat, ratio)
    se = n_sat * rate_per_sat.std(ddof=1) / math.sqrt(rate_per_sat.size)
    # Monte Carlo error: 5 standard errors (plus the grazing-pass allowance of 1e-3)
    assert abs(n_sat * rate_per_sat.mean() - want) < 5 * se + 1e-3 * want
    want_dur = float(A.isotropic_mean_in_view(n_sat, psi0)) / want
    assert abs(dur.mean() - want_dur) < 5 * dur.std(ddof=1) / math.sqrt(dur.size)


def test_inclination_average_is_isotropic_and_frozen_isotropic_is_closed_form():
    # Uniform orbit normals have inclination density sin(i)/2: averaging the inclined flux
    # over it must give the isotropic rate N omega sin(psi0)/(2 pi) (frozen Earth), and with
    # rotation the isotropic rotating form.  Outer quadrature: 40-point Gauss-Legendre on each
    # piece between the inclinations where the cap touches an orbit's highest latitude, after
    # i = lo + (hi - lo)(1 - cos t)/2 (square-root behaviour there); tolerance 1e-5 relative,
    # the outer rule's accuracy for such pieces.
    lat, psi0 = 40.0, 0.3
    d = math.radians(lat)
    edges = sorted({0.0, math.pi, *(x for x in (d - psi0, d + psi0, math.pi - d - psi0,
                                                  math.pi - d + psi0) if 0 < x < math.pi)})
    x, w = np.polynomial.legendre.leggauss(40)
    t = (x + 1) * math.pi / 2
    for ratio in (0.0, 0.2):
        avg = 0.0
        for lo, hi in zip(edges[:-1], edges[1:]):
            inc = lo + (hi - lo) * (1 - np.cos(t)) / 2
            jac = (hi - lo) / 2 * np.sin(t) * (math.pi / 2) * w
            vals = [S.inclined_pass_rate_per_s(100, math.degrees(i), lat, psi0, 1.0, ratio)
                    for i in inc]
            avg += float(np.sum(np.array(vals) * np.sin(inc) / 2 * jac))
        assert avg == pytest.approx(S.isotropic_pass_rate_per_s(100, psi0, 1.0, lat, ratio),
                                    rel=1e-5)
    assert S.isotropic_pass_rate_per_s(100, psi0, 1.0) == pytest.approx(
        float(A.isotropic_pass_rate_per_s(100, psi0, 1.0)), rel=1e-14)
