"""Closed forms in dwell.analytic against standards' worked values and independent Monte Carlo."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.spatial import cKDTree

from dwell.analysis import analytic as A
from dwell.analysis import nearest_rate as A_near

R_KM = 6371.0  # mean Earth radius of the 3GPP NTN tables (TR 38.811 / 38.821)


def _uniform_sphere(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """Uniform unit vectors by normalised Gaussian triples (Muller 1959), shape + (3,)."""
    v = rng.standard_normal(shape + (3,))
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


# ---- geometry ----------------------------------------------------------------------------------

@pytest.mark.parametrize("altitude_km, range_km, rtd_ms", [(600.0, 1932.0, 25.77),
                                                            (1200.0, 3131.0, 41.77)])
def test_slant_range_and_delay_match_tr38821(altitude_km, range_km, rtd_ms):
    # 3GPP TR 38.821 (NTN solutions), LEO reference scenarios at 10 deg minimum elevation:
    # slant range 1932 km (600 km) and 3131 km (1200 km); transparent-payload maximum
    # round-trip delay 25.77 ms and 41.77 ms (values from memory).
    # tolerance: the table rounds range to 1 km and delay to 0.01 ms.
    assert A.slant_range_km(10.0, altitude_km) == pytest.approx(range_km, abs=0.5)
    assert A.max_round_trip_delay_ms(10.0, altitude_km) == pytest.approx(rtd_ms, abs=0.01)


@pytest.mark.parametrize("elevation_deg, altitude_km", [(10.0, 600.0), (25.0, 1200.0),
                                                        (40.0, 8000.0), (0.0, 550.0)])
def test_cap_half_angle_and_range_by_vector_geometry(elevation_deg, altitude_km):
    # Independent plane geometry (common practice): terminal at (R, 0), satellite at central
    # angle psi on radius r; elevation = angle of the line of sight above the local horizontal.
    r = R_KM + altitude_km
    psi = A.cap_half_angle_rad(elevation_deg, r)
    term = np.array([R_KM, 0.0])
    sat = r * np.array([np.cos(psi), np.sin(psi)])
    los = sat - term
    el = np.degrees(np.arcsin(los[0] / np.linalg.norm(los)))  # up = +x at the terminal
    # tolerance: float rounding only
    assert el == pytest.approx(elevation_deg, abs=1e-9)
    assert A.slant_range_km(elevation_deg, altitude_km) == pytest.approx(np.linalg.norm(los),
                                                                         rel=1e-12)


def test_zenith_limits():
    # At 90 deg elevation the cap shrinks to the zenith and the range is the altitude
    # (geometry, common practice); tolerance float rounding.
    assert A.cap_half_angle_rad(90.0, R_KM + 700.0) == pytest.approx(0.0, abs=1e-12)
    assert A.slant_range_km(90.0, 700.0) == pytest.approx(700.0, rel=1e-12)


def test_orbit_rate_geostationary_period():
    # A geostationary orbit (altitude 35786 km above the 6378.137 km equatorial radius) has a
    # period of one sidereal day, 86164.09 s (handbook values, from memory).
    # tolerance: the altitude is rounded to 1 km, and dT/T = 1.5 da/a gives 1.5 s.
    period_s = 2 * np.pi / A.orbit_angular_rate_rad_s(35786.0)
    assert period_s == pytest.approx(86164.09, abs=2.0)


def test_longest_polar_pass_by_direct_propagation():
    # Terminal at the north pole, circular polar orbit through its zenith: propagate
    # r(t) = a (cos wt, 0, sin wt) and time how long the elevation (vector geometry) stays above
    # 10 deg; compare with the orbital-geometry result 2 psi0 / omega (SMAD-style textbooks).
    alt, mask = 800.0, 10.0
    a = R_KM + alt
    w = A.orbit_angular_rate_rad_s(alt, equatorial_radius_km=R_KM)
    dt = 0.01
    t = np.arange(0.0, 2 * np.pi / w, dt)
    sat = a * np.stack([np.cos(w * t), np.zeros_like(t), np.sin(w * t)], axis=1)
    los = sat - np.array([0.0, 0.0, R_KM])
    el = np.degrees(np.arcsin(los[:, 2] / np.linalg.norm(los, axis=1)))
    measured = np.count_nonzero(el >= mask) * dt
    expected = A.longest_polar_pass_s(A.cap_half_angle_rad(mask, a), w)
    # tolerance: one time step at each end of the pass
    assert measured == pytest.approx(expected, abs=2 * dt)


# ---- isotropic constellation ----------------------------------------------------------------

def test_isotropic_counts_against_monte_carlo():
    # Binomial point process of N uniform satellites (spherical-cap area fraction): Monte Carlo
    # of M snapshots of N uniform points, counted inside the cap around the north pole.
    n_sat, m = 40, 25000
    psi0 = A.cap_half_angle_rad(10.0, R_KM + 600.0)
    rng = np.random.default_rng(1)
    z = _uniform_sphere(rng, (m, n_sat))[..., 2]
    counts = np.count_nonzero(z >= np.cos(psi0), axis=1)
    q = (1 - np.cos(psi0)) / 2  # per-satellite probability, for the standard errors only
    # Monte Carlo error: counts are binomial(N, q) per snapshot; 5 standard errors
    mean_se = np.sqrt(n_sat * q * (1 - q) / m)
    assert abs(counts.mean() - A.isotropic_mean_in_view(n_sat, psi0)) < 5 * mean_se
    p0 = A.isotropic_p_none(n_sat, psi0)
    assert abs(np.mean(counts == 0) - p0) < 5 * np.sqrt(p0 * (1 - p0) / m)


@pytest.mark.parametrize("psi0", [0.28, 0.6])
def test_pass_rate_and_duration_against_random_great_circles(psi0):
    # Geometric probability: satellites on uniformly random great circles (random plane from two
    # Gaussian vectors, Gram-Schmidt) sampled at K points per revolution; a circle with any point
    # in the cap gives one pass per revolution, lasting (points inside) * (2 pi / K) / omega.
    m, k, n_sat = 4000, 2048, 66
    w = A.orbit_angular_rate_rad_s(780.0)
    rng = np.random.default_rng(int(psi0 * 1000))
    u = rng.standard_normal((m, 3))
    v = rng.standard_normal((m, 3))
    a = u / np.linalg.norm(u, axis=1, keepdims=True)
    b = v - np.sum(v * a, axis=1, keepdims=True) * a
    b /= np.linalg.norm(b, axis=1, keepdims=True)
    theta = np.arange(k) * (2 * np.pi / k)
    z = np.cos(theta)[None, :] * a[:, 2:3] + np.sin(theta)[None, :] * b[:, 2:3]  # T = north pole
    inside = np.count_nonzero(z >= np.cos(psi0), axis=1)
    hit = inside > 0
    p_hit = hit.mean()
    rate = n_sat * p_hit * w / (2 * np.pi)
    # Monte Carlo error: circles are independent, hit ~ binomial(m, sin psi0); 5 standard errors
    p = np.sin(psi0)
    se_rate = n_sat * np.sqrt(p * (1 - p) / m) * w / (2 * np.pi)
    assert abs(rate - A.isotropic_pass_rate_per_s(n_sat, psi0, w)) < 5 * se_rate
    step = 2 * np.pi / k
    dur = inside[hit] * step / w
    # Monte Carlo error: 5 sample standard errors of the mean duration; the lattice count of an
    # arc with a uniformly random phase has mean (arc / step) exactly, and grazing chords shorter
    # than one step (missed hits) are a fraction ~ step^2 / psi0^2 < 1e-4 of circles.
    se_dur = dur.std(ddof=1) / np.sqrt(dur.size)
    assert abs(dur.mean() - A.isotropic_mean_pass_duration_s(psi0, w)) < 5 * se_dur
    # the longest chord is the cap diameter; among ~1000 hits the closest-to-centre one is
    # offset by ~psi0/1000 rad, shortening it by far less than 0.01 rad; plus one lattice step
    longest = A.longest_polar_pass_s(psi0, w)
    assert longest - 0.01 / w < dur.max() <= longest + step / w


# ---- inclined orbits -----------------------------------------------------------------------------

@pytest.mark.parametrize("psi0", [0.1, 0.3, 0.7])
def test_walker_polar_orbit_polar_terminal_closed_form(psi0):
    # Special case: for i = 90 deg the latitude density cos(phi)/(pi sqrt(1 - sin^2 phi)) is
    # uniform, 1/pi on (-pi/2, pi/2), and a cap of half-angle psi0 about a pole is the band
    # phi > pi/2 - psi0 over all longitudes, so the mean in view is N psi0 / pi (derived here;
    # equivalently the fraction 2 psi0 / (2 pi) of each orbit spent in the cap).
    # tolerance: quadrature accuracy
    for lat in (90.0, -90.0):
        assert A.walker_mean_in_view(100, 90.0, lat, psi0) == pytest.approx(100 * psi0 / np.pi,
                                                                           rel=1e-9)


@pytest.mark.parametrize("incl_deg, lat_deg, psi0", [
    (53.0, 0.0, 0.3),     # equatorial terminal
    (53.0, 45.0, 0.3),    # mid latitude
    (53.0, 60.0, 0.25),   # cap straddles the orbit's highest latitude
    (97.0, 80.0, 0.3),    # retrograde, cap over the pole
    (86.4, -70.0, 0.4),   # southern hemisphere, cap over the south pole
    (150.0, -20.0, 0.3),  # strongly retrograde
    (0.0, 5.0, 0.2),      # equatorial orbit
])
def test_walker_mean_in_view_against_monte_carlo(incl_deg, lat_deg, psi0):
    # Direct Monte Carlo of the inclined-orbit position distribution (uniform node, uniform
    # argument of latitude; orbital elements to Cartesian, textbook rotation), counted in the cap.
    m, n_sat = 400000, 120
    rng = np.random.default_rng(int(incl_deg * 10 + lat_deg + 500))
    node = rng.uniform(0, 2 * np.pi, m)
    u = rng.uniform(0, 2 * np.pi, m)
    i = np.radians(incl_deg)
    pos = np.stack([np.cos(node) * np.cos(u) - np.sin(node) * np.sin(u) * np.cos(i),
                    np.sin(node) * np.cos(u) + np.cos(node) * np.sin(u) * np.cos(i),
                    np.sin(u) * np.sin(i)], axis=1)
    lat = np.radians(lat_deg)
    term = np.array([np.cos(lat), 0.0, np.sin(lat)])
    q = np.mean(pos @ term >= np.cos(psi0))
    got = A.walker_mean_in_view(n_sat, incl_deg, lat_deg, psi0)
    # Monte Carlo error: binomial(m, q) per draw; 5 standard errors (plus 1e-9 float slack)
    assert abs(got - n_sat * q) < 5 * n_sat * np.sqrt(q * (1 - q) / m) + 1e-9


def test_walker_zero_when_orbit_never_reaches_cap():
    # i < |lat| - psi0: the orbit's highest latitude is below the cap (geometry, common
    # practice); exact zero.
    assert A.walker_mean_in_view(100, 30.0, 60.0, 0.2) == 0.0
    assert A.walker_mean_in_view(100, 30.0, -60.0, 0.2) == 0.0


@pytest.mark.parametrize("lat_deg", [40.0, 80.0])
def test_walker_averaged_over_isotropic_inclinations_is_isotropic(lat_deg):
    # Uniformly random orbit normals have inclination density sin(i)/2 on [0, pi] (uniform
    # direction on the sphere), so averaging over i must give the isotropic N (1 - cos psi0)/2.
    psi0, n_sat = 0.3, 100
    d = np.radians(lat_deg)
    kinks = sorted(x for x in (d - psi0, d + psi0, np.pi - d - psi0, np.pi - d + psi0, np.pi / 2)
                   if 0 < x < np.pi)
    avg, _ = quad(lambda i: A.walker_mean_in_view(n_sat, np.degrees(i), lat_deg, psi0)
                  * np.sin(i) / 2, 0, np.pi, points=kinks, limit=200, epsrel=1e-8)
    # tolerance: nested adaptive quadrature, relative 1e-8 requested; 1e-6 allowed
    assert avg == pytest.approx(A.isotropic_mean_in_view(n_sat, psi0), rel=1e-6)


# ---- handover rates ------------------------------------------------------------------------------

def test_voronoi_rate_against_planar_poisson_monte_carlo():
    # Lin, Ganti, Fleming and Andrews (IEEE TWC 12(4), 2013): a straight path through a planar
    # Poisson-Voronoi tessellation of intensity lambda crosses 4 sqrt(lambda)/pi cell boundaries
    # per unit length.  Monte Carlo: Poisson points in a strip around a long path, nearest
    # neighbour (scipy cKDTree) at fine spacing, count changes of the nearest point.
    lam, length, half_width, step = 2.0, 2000.0, 6.0, 0.002
    rng = np.random.default_rng(7)
    x0, x1 = -half_width, length + half_width
    n = rng.poisson(lam * (x1 - x0) * 2 * half_width)
    pts = np.column_stack([rng.uniform(x0, x1, n), rng.uniform(-half_width, half_width, n)])
    # P(no point within half_width of a path point) = exp(-lam pi 36): the strip cannot
    # change any nearest neighbour.
    xs = np.arange(0.0, length, step)
    _, nearest = cKDTree(pts).query(np.column_stack([xs, np.zeros_like(xs)]))
    change = nearest[1:] != nearest[:-1]
    batches = change[: change.size // 20 * 20].reshape(20, -1).sum(axis=1)
    per_len = batches / (length / 20)
    expected = A.voronoi_handover_rate_per_s(1.0, lam)  # unit speed: crossings per unit length
    # Monte Carlo error: 5 standard errors from 20 batch means (adjacent batches share only
    # about one cell); plus 0.3% for cells cut by less than one step and so missed
    se = per_len.std(ddof=1) / np.sqrt(per_len.size)
    assert abs(per_len.mean() - expected) < 5 * se + 0.003 * expected


def test_voronoi_rate_worked_value():
    # Lin et al. 2013 formula by hand: v = 10 m/s, lambda = 1e-6 /m^2 (1 per km^2) ->
    # 4 * 10 * 1e-3 / pi per second.  tolerance: float rounding only
    assert A.voronoi_handover_rate_per_s(10.0, 1e-6) == pytest.approx(0.04 / np.pi, rel=1e-12)


@pytest.mark.parametrize("radius_km", [6971.0, 42164.0])
def test_nearest_satellite_rate_tangent_plane_value(radius_km):
    # Lin et al. 2013 in the tangent plane, by hand: N = 400 pi satellites give
    # lambda r^2 = N / (4 pi) = 100, so the rate is 4 (omega r) sqrt(100 / r^2) / pi
    # = 40 omega / pi whatever r.  tolerance: float rounding only
    w = 1e-3
    got = A.nearest_satellite_handover_rate_per_s(400 * np.pi, radius_km, w)
    assert got == pytest.approx(40 * w / np.pi, rel=1e-12)


# ---- steepest obstruction ----------------------------------------------------------------------

def test_frechet_tan_against_poisson_street_monte_carlo():
    # Resnick (1987): the maximum of (H - h)/x over a Poisson process of obstacles is Frechet,
    # exp(-lambda E[(H-h)+]/t).  Monte Carlo: Poisson obstacles on [0, 3000 m], exponential
    # heights of mean 8 m (E[(H-h)+] = 8 exp(-h/8) by memorylessness), terminal at 1.5 m.
    lam, mean_h, h, reach = 0.05, 8.0, 1.5, 3000.0
    excess = mean_h * np.exp(-h / mean_h)
    m = 20000
    rng = np.random.default_rng(3)
    n = rng.poisson(lam * reach, m)
    owner = np.repeat(np.arange(m), n)
    x = rng.uniform(0, reach, owner.size)
    tan = (rng.exponential(mean_h, owner.size) - h) / x
    steepest = np.full(m, -np.inf)
    np.maximum.at(steepest, owner, tan)
    # obstacles beyond 3000 m matter only for heights above t * 3000 m (> 700 m here): nil
    med = A.frechet_tan_median(lam, excess)
    for t in (0.5 * med, med, 2.0 * med):
        p = float(A.frechet_tan_cdf(t, lam, excess))
        # Monte Carlo error: independent streets, binomial; 5 standard errors
        assert abs(np.mean(steepest <= t) - p) < 5 * np.sqrt(p * (1 - p) / m)
    # the median solves exp(-a/t) = 1/2 (tolerance: float rounding)
    assert float(A.frechet_tan_cdf(med, lam, excess)) == pytest.approx(0.5, rel=1e-12)
    assert float(A.frechet_tan_cdf(0.0, lam, excess)) == 0.0


# ---- statistics --------------------------------------------------------------------------------

@pytest.mark.parametrize("count, lower, upper", [(0, 0.0, 3.689), (1, 0.0253, 5.572),
                                                 (5, 1.624, 11.668), (10, 4.795, 18.390)])
def test_garwood_interval_textbook_values(count, lower, upper):
    # Exact (Garwood 1936) 95% Poisson limits as tabulated in statistics textbooks (from
    # memory): 0 -> (0, 3.689), 1 -> (0.0253, 5.572), 5 -> (1.624, 11.668),
    # 10 -> (4.795, 18.390).  tolerance: the tables' rounding (3 decimals / 3 significant).
    lo, hi = A.poisson_rate_interval(count, 1.0)
    assert float(lo) == pytest.approx(lower, abs=6e-4)
    assert float(hi) == pytest.approx(upper, abs=6e-4)


def test_garwood_interval_scales_with_exposure_and_level():
    # Zero events: upper limit -ln(alpha/2) / T (chi-square with 2 dof is exponential), i.e.
    # 3.689 at 95% and 2.996 at 90% (from memory); rates scale as 1/exposure.
    # tolerance: 3-decimal rounding of the quoted values
    lo, hi = A.poisson_rate_interval(0, 1000.0)
    assert float(lo) == 0.0 and float(hi) == pytest.approx(3.689e-3, abs=6e-7)
    _, hi90 = A.poisson_rate_interval(0, 1.0, confidence=0.90)
    assert float(hi90) == pytest.approx(2.996, abs=6e-4)
    lo_v, hi_v = A.poisson_rate_interval(np.array([1, 10]), 2.0)
    np.testing.assert_allclose(lo_v, [0.0253 / 2, 4.795 / 2], atol=3e-4)
    np.testing.assert_allclose(hi_v, [5.572 / 2, 18.390 / 2], atol=3e-4)


# ---- exact nearest-satellite handover rate (docs/nearest-satellite-rate.md) ------------------

def _random_great_circles(rng: np.random.Generator, shape: tuple[int, ...]
                          ) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal (a, b) per satellite: position a at t = 0, direction of motion b, on a
    uniformly random great circle at a uniform phase (Gaussian vectors, Gram-Schmidt)."""
    a = _uniform_sphere(rng, shape)
    v = rng.standard_normal(shape + (3,))
    b = v - np.sum(v * a, axis=-1, keepdims=True) * a
    return a, b / np.linalg.norm(b, axis=-1, keepdims=True)


def _nearest_changes_mc(n_sat: int, psi_c: float, realizations: int, steps: int, seed: int,
                        terminal_rate: float = 0.0) -> tuple[float, float, float, float]:
    """Monte Carlo of the model itself: `realizations` independent shells of `n_sat` random
    great-circle satellites (omega = 1), each sampled at `steps` instants over one orbit; count
    changes of the nearest satellite (all, and with both nearest satellites within psi_c).
    The terminal starts at the north pole and moves along the x-z great circle at
    `terminal_rate` (rad per unit time).  Returns (all rate, its s.e., in-view rate, its s.e.),
    standard errors from the spread over independent realizations."""
    rng = np.random.default_rng(seed)
    period = 2 * np.pi
    t = np.arange(steps) * (period / steps)
    term = np.stack([np.sin(terminal_rate * t), np.zeros_like(t), np.cos(terminal_rate * t)], 1)
    counts_all, counts_view = [], []
    for chunk in np.array_split(np.arange(realizations), max(1, realizations // 50)):
        a, b = _random_great_circles(rng, (chunk.size, n_sat))
        # cos(psi) of every satellite at every instant, laid out (shell, instant, satellite)
        ca = np.einsum("msk,tk->mts", a, term)
        cb = np.einsum("msk,tk->mts", b, term)
        z = np.cos(t)[None, :, None] * ca + np.sin(t)[None, :, None] * cb
        near = np.argmax(z, axis=2)
        zmax = np.max(z, axis=2)
        change = near[:, 1:] != near[:, :-1]
        view = (zmax[:, 1:] >= np.cos(psi_c)) & (zmax[:, :-1] >= np.cos(psi_c))
        counts_all.append(change.sum(axis=1))
        counts_view.append((change & view).sum(axis=1))
    c_all = np.concatenate(counts_all) / period
    c_view = np.concatenate(counts_view) / period
    m = realizations
    return (c_all.mean(), c_all.std(ddof=1) / np.sqrt(m), c_view.mean(),
            c_view.std(ddof=1) / np.sqrt(m))


@pytest.mark.parametrize("n_sat, psi_c, seed", [(12, 1.0, 41), (40, 0.5, 42)])
def test_nearest_handover_rate_against_random_great_circles(n_sat, psi_c, seed):
    # Derivation: docs/nearest-satellite-rate.md (Rice's formula for the equidistance
    # crossings of the two nearest points of a binomial point process).  Monte Carlo of the
    # same model (independent uniformly random great circles, not dwell's simulator).
    # Sampling step: 2 pi / 2048 rad of orbit.  A change is missed only if the nearest changes
    # twice within one step, which needs |psi_i' - psi_j'| / omega below about one step
    # (3e-3); under Rice's |g'| weighting that is a fraction ~ 1e-4 of the changes.  The
    # in-view test at the sampled instants misplaces changes within one step of psi_c: a
    # fraction below 1e-3.  Both far below the Monte Carlo error allowed.
    rate_all, se_all, rate_view, se_view = _nearest_changes_mc(n_sat, psi_c, 400, 2048, seed)
    want_all = A_near.isotropic_nearest_handover_rate_per_s(n_sat, 1.0)
    want_view = A_near.isotropic_nearest_handover_rate_per_s(n_sat, 1.0, psi_c)
    # Monte Carlo error: 5 standard errors over independent shells
    assert abs(rate_all - want_all) < 5 * se_all
    assert abs(rate_view - want_view) < 5 * se_view
    assert want_view < want_all   # changes below the floor exist at these sizes


def test_nearest_handover_rate_moving_terminal_against_monte_carlo():
    # A terminal moving at half the satellites' angular rate (far beyond Earth rotation, to
    # make its term visible): the velocity factor becomes the Bessel integral
    # (2/pi) int (1 - J0(t)^2 J0(v t)^2) / t^2 dt (docs/nearest-satellite-rate.md).
    v, n_sat, psi_c = 0.5, 20, 0.9
    rate_all, se_all, rate_view, se_view = _nearest_changes_mc(n_sat, psi_c, 600, 4096, 43,
                                                               terminal_rate=v)
    want = A_near.isotropic_nearest_handover_rate_per_s(n_sat, 1.0, terminal_rate_rad_s=v)
    want_view = A_near.isotropic_nearest_handover_rate_per_s(n_sat, 1.0, psi_c, v)
    # Monte Carlo error: 5 standard errors; sampling step as in the standing case
    assert abs(rate_all - want) < 5 * se_all
    assert abs(rate_view - want_view) < 5 * se_view
    # the motion must matter at this size: more than 10 standard errors above standing
    assert want - A_near.isotropic_nearest_handover_rate_per_s(n_sat, 1.0) > 10 * se_all


def test_mean_abs_rate_difference_against_sampling_and_closed_form():
    # E|cos a1 - cos a2| = 8 / pi^2 (product of two independent |sin| means, derived in
    # docs/nearest-satellite-rate.md); the Bessel form must agree with it as v -> 0 and with
    # direct sampling of four uniform angles at v = 0.3.
    # tolerance: quadrature 1e-7 relative; sampling 5 standard errors of 2e6 draws.
    assert A_near.mean_abs_rate_difference(2.0) == pytest.approx(16 / np.pi ** 2, rel=1e-12)
    assert A_near.mean_abs_rate_difference(1.0, 1e-9) == pytest.approx(8 / np.pi ** 2, rel=1e-6)
    rng = np.random.default_rng(44)
    ang = rng.uniform(0, 2 * np.pi, (4, 2_000_000))
    x = np.abs(np.cos(ang[0]) - np.cos(ang[1]) - 0.3 * (np.cos(ang[2]) - np.cos(ang[3])))
    assert abs(A_near.mean_abs_rate_difference(1.0, 0.3) - x.mean()) < 5 * x.std() / np.sqrt(x.size)


def test_nearest_rate_worked_value_and_planar_limit():
    # Worked value (docs/nearest-satellite-rate.md): two satellites swap at omega / pi
    # (B(3/2, 3/2) = pi/8).  Large N: the exact rate over the planar Poisson-Voronoi rate
    # (Lin et al. 2013 in the tangent plane) is Gamma(N - 1/2) / (sqrt(N) Gamma(N - 1)),
    # 1 - 5/(8N) + O(1/N^2) (Stirling), so it tends to 1.  tolerance: float rounding; the
    # O(1/N^2) remainder for the expansion (its coefficient is -0.18, from the next terms of
    # Gamma(z + 1/2)/Gamma(z) = sqrt(z)(1 - 1/(8z) + 1/(128 z^2)), so 1/N^2 bounds it).
    assert A_near.isotropic_nearest_handover_rate_per_s(2, 3.0) == pytest.approx(3.0 / np.pi,
                                                                                  rel=1e-12)
    for n in (10, 100, 1000, 100000):
        exact = A_near.isotropic_nearest_handover_rate_per_s(n, 1e-3)
        planar = float(A.nearest_satellite_handover_rate_per_s(n, 7000.0, 1e-3))
        # tolerance: log-gamma / log-beta rounding grows with N (about 1e-10 at N = 1e5)
        assert exact / planar == pytest.approx(float(A_near.planar_limit_ratio(n)), rel=1e-8)
        if n <= 1000:  # beyond that the remainder (-0.18/N^2) is below float rounding
            assert exact / planar == pytest.approx(1 - 5 / (8 * n), abs=1.0 / n ** 2)
    # a full cap counts every change
    assert A_near.isotropic_nearest_handover_rate_per_s(50, 1.0, np.pi) == pytest.approx(
        A_near.isotropic_nearest_handover_rate_per_s(50, 1.0), rel=1e-12)
