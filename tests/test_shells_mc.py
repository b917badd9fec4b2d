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


@pytest.mark.parametrize("lat, incl", [(35.0, 60.0), (-62.0, 97.0)])
def test_in_view_count_law_of_combined_shells_against_snapshots(lat, incl):
    # Two isotropic shells: the count is the convolution of two binomials (independent
    # satellites, cap-area fractions), exact.  An inclined shell of independent satellites
    # (random nodes) is Binomial(N, M/N) with M the latitude-density mean; the formula's
    # Poisson law of mean M differs from that binomial by a total variation computed here with
    # scipy (Le Cam 1960 bounds it by M^2/N).  Monte Carlo: snapshots of independent
    # satellites (uniform nodes and phases) counted in the cap.
    from scipy.stats import binom
    rng = np.random.default_rng(int(77 + lat))
    snaps = 12000
    site = S.Site(lat, 1.0, 0.0)
    shells = [S.Shell(80, 1.1, 1.0, None), S.Shell(50, 1.3, 1.0, None),
              S.Shell(600, 1.03, 1.0, incl)]
    t = np.array([math.cos(math.radians(lat)), 0.0, math.sin(math.radians(lat))])
    counts = np.zeros((len(shells), snaps), dtype=int)
    for j, shell in enumerate(shells):
        psi0 = site.psi0(shell)
        for chunk in np.array_split(np.arange(snaps), 6):
            n1, n2 = _orbits(rng, chunk.size * shell.n_sat, shell.inclination_deg)
            u = rng.uniform(0.0, 2 * np.pi, chunk.size * shell.n_sat)
            pos = np.cos(u)[:, None] * n1 + np.sin(u)[:, None] * n2
            inside = (pos @ t >= math.cos(psi0)).reshape(chunk.size, shell.n_sat)
            counts[j, chunk] = inside.sum(axis=1)
    k = np.arange(30)
    # exact part: two isotropic shells; 5 binomial standard errors per count value
    emp = np.array([np.mean(counts[0] + counts[1] == i) for i in k])
    want = S.in_view_pmf(shells[:2], site, k_max=29)
    np.testing.assert_array_less(np.abs(emp - want), 5 * np.sqrt(want * (1 - want) / snaps) + 1e-4)
    # the labelled approximation: total variation to the Monte Carlo law at most the
    # Poisson-binomial distance plus the empirical law's noise (E|emp_k - p_k| <=
    # sqrt(p_k (1 - p_k) / n), so the expected noise in the total variation is at most half
    # their sum; twice that is allowed)
    shell = shells[2]
    m = S.mean_in_view(shell, site)
    kk = np.arange(120)
    pois = S.in_view_pmf([shell], site, k_max=119)
    exact = binom.pmf(kk, shell.n_sat, m / shell.n_sat)
    model_tv = 0.5 * np.abs(exact - pois).sum()
    emp = np.bincount(counts[2], minlength=120)[:120] / snaps
    noise = float(np.sum(np.sqrt(pois * (1 - pois) / snaps)))
    assert 0.5 * np.abs(emp - pois).sum() < model_tv + noise
    assert model_tv < m * m / shell.n_sat < 0.3        # Le Cam, and the check is not vacuous
    # means and variances add over shells (convolution; tolerance float rounding)
    assert S.shells_mean_in_view(shells[:2], site) == pytest.approx(
        S.mean_in_view(shells[0], site) + S.mean_in_view(shells[1], site), rel=1e-14)
    assert S.in_view_sd(shells[:2], site) == pytest.approx(
        math.sqrt(float(np.sum(k ** 2 * want)) - float(np.sum(k * want)) ** 2), rel=1e-6)
