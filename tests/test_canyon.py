"""Checks of the stochastic street canyon (dwell.obstruction.canyon) against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from dwell.io.errors import InputError
from dwell.io.schema import check_table
from dwell.obstruction.canyon import KEYS, Canyon, check, frechet_cdf, sample_law

ALPHA = 0.01  # significance level of every goodness-of-fit test below


# ---- 1. half-line cut: Frechet law of the maximum of a Poisson-marked process --------------------

def _cut_samples(params: dict, n_real: int, seed0: int) -> np.ndarray:
    """One sample per side per independent realisation, at x = 0 (the two sides are independent)."""
    out = [Canyon(params, seed0 + k).half_line_cut_tan(side, 0.0)
           for k in range(n_real) for side in (0, 1)]
    return np.array(out, dtype=float)


@pytest.mark.parametrize("law, mean_m, h_m", [
    ("exponential", 20.0, 0.0),
    ("deterministic", 20.0, 0.0),
    ("exponential", 20.0, 5.0),
])
def test_half_line_cut_is_frechet(law: str, mean_m: float, h_m: float) -> None:
    lam_per_m = 0.06
    params = {"width_m": 20.0, "buildings_per_km": 1000.0 * lam_per_m, "antenna_height_m": h_m,
              "height_law": law, "height_mean_m": mean_m}
    t = _cut_samples(params, 1000, seed0=1000)
    # E[(H-h)+]: exponential mean m -> m exp(-h/m) (memoryless law); deterministic H0 -> (H0-h)+
    excess = mean_m * math.exp(-h_m / mean_m) if law == "exponential" else max(mean_m - h_m, 0.0)
    # Source: the largest tan of a Poisson process of starts (intensity lambda) with i.i.d. marks
    # (H-h)+/distance has P(T <= t) = exp(-lambda E[(H-h)+] / t), a Frechet law of shape 1
    # (Resnick, "Extreme Values, Regular Variation and Point Processes", 1987).  The reference CDF
    # is scipy's invweibull(c=1, scale=s): exp(-s/t).  The realisation only holds buildings out to
    # 1000 m, which changes the CDF only for t < Hmax/1000 where it is below exp(-50): negligible.
    ref = stats.invweibull(1.0, scale=lam_per_m * excess)
    res = stats.kstest(t, ref.cdf)
    assert res.pvalue > ALPHA, res
    # Power: with n = 2000 the KS critical distance at 1% is 1.63/sqrt(n) = 0.036 (Smirnov's
    # asymptotic quantile), far below the 0.09 gap between the law with E[(H-h)+] and with E[H]
    # (scale ratio exp(-5/20) = 0.78 or 15/20), so a generator ignoring the antenna height fails.
    if h_m > 0.0:
        wrong = stats.invweibull(1.0, scale=lam_per_m * mean_m)
        assert stats.kstest(t, wrong.cdf).pvalue < ALPHA


def test_frechet_cdf_matches_scipy() -> None:
    # Source: scipy.stats.invweibull(c=1, scale=s).cdf(t) = exp(-s/t) (Frechet law of shape 1);
    # 1e-12 is float rounding.
    t = np.array([0.01, 0.1, 0.5, 1.0, 3.0, 50.0])
    ref = stats.invweibull(1.0, scale=0.06 * 18.5).cdf(t)
    assert np.allclose(frechet_cdf(t, 0.06, 18.5), ref, rtol=0, atol=1e-12)
    assert frechet_cdf(np.array([-1.0, 0.0]), 0.06, 18.5).tolist() == [0.0, 0.0]


# ---- 2. exact 3-D mask against an independent brute-force ray march ------------------------------

def _brute_bounds(c: Canyon, az_deg: np.ndarray, x_m: np.ndarray, s_max_m: float, ds_m: float):
    """Lower and upper bounds of the mask by sampling each horizontal ray every ds.

    A ray of elevation el >= 0 is blocked by a box iff some point of its horizontal trace at
    distance s inside the footprint has h + s tan(el) < H, so the mask is the sup of
    atan((H - h)/s) over such points.  Sampled points inside the true footprints give a lower
    bound; the first sample after the true entry lies within ds of the footprint, so sampling
    footprints grown by ds and using s - ds gives an upper bound (it also survives grazing rays).
    """
    boxes = []
    for side in c.sides:
        for a, e, H in zip(side.start_m, side.end_m, side.height_m):
            boxes.append((a, e, side.w_lo_m, side.w_hi_m, H))
    a, e, w0, w1, H = (np.array(v)[None, None, :] for v in zip(*boxes))
    excess = H - c.antenna_height_m
    s = np.arange(1, int(s_max_m / ds_m) + 1) * ds_m
    lower = np.full(az_deg.size, -90.0)
    upper = np.full(az_deg.size, -90.0)
    for q in range(az_deg.size):
        phi = math.radians(az_deg[q] - c.azimuth_deg)
        u = (x_m[q] + s * math.cos(phi))[:, None, None]
        w = (c.lateral_m + s * math.sin(phi))[:, None, None]
        inside = (u >= a) & (u <= e) & (w >= w0) & (w <= w1) & (excess > 0)
        grown = ((u >= a - ds_m) & (u <= e + ds_m) & (w >= w0 - ds_m) & (w <= w1 + ds_m)
                 & (excess > 0))
        ss = s[:, None, None]
        lo = np.where(inside, np.degrees(np.arctan2(excess, ss)), -90.0)
        hi = np.where(grown, np.degrees(np.arctan2(excess, ss - ds_m)), -90.0)
        lower[q], upper[q] = lo.max(), hi.max()
    return lower, upper


def test_mask_matches_brute_force_ray_march() -> None:
    params = {"width_m": 12.0, "lateral_m": 1.0, "depth_m": 8.0, "buildings_per_km": 120.0,
              "height_law": "lognormal", "height_mean_m": 12.0, "height_sigma": 0.3,
              "length_law": "exponential", "length_mean_m": 10.0, "street_length_m": 140.0,
              "azimuth_deg": 35.0, "antenna_height_m": 1.5}
    c = Canyon(params, seed=7, along_range_m=(-10.0, 10.0))
    floor_deg = 20.0
    # Plain trigonometry: a building at horizontal distance s > (Hmax-h)/tan(floor) stays below
    # the floor, so marching to that distance decides every value above the floor; the canyon's
    # realisation must reach that far past the query range (precondition, not a check).
    s_max = (c.max_height_m - c.antenna_height_m) / math.tan(math.radians(floor_deg))
    assert s_max < c.margin_m
    rng = np.random.default_rng(2024)
    n = 300
    az = rng.uniform(0.0, 360.0, n)
    x = rng.uniform(-10.0, 10.0, n)
    ds = 0.01
    lower, upper = _brute_bounds(c, az, x, s_max + ds, ds)
    exact = np.maximum(c.mask_elevation_deg(az, x, floor_deg=floor_deg), floor_deg)
    lower, upper = np.maximum(lower, floor_deg), np.maximum(upper, floor_deg)
    # 1e-9 deg: float rounding only; the bounds hold by construction for every ray
    assert np.all(exact >= lower - 1e-9)
    assert np.all(exact <= upper + 1e-9)
    # Tightness (power of the check): d/ds atan(c/s) = c/(s^2+c^2) <= 1/(2s), and s >= 5 m (the
    # near facade), so one march step moves the angle by <= ds/(2*5) rad = 0.057 deg; the lower
    # bound is within 0.06 deg of the truth unless a ray passes within ds of a corner (a few
    # percent of rays here), when the bracket is loose but must still hold.
    assert np.mean(upper - lower < 0.12) > 0.9
    assert np.all(np.abs(exact - lower)[upper - lower < 0.12] <= 0.06)
    # the comparison must include many blocked rays, not just the floor
    assert np.mean(exact > floor_deg) > 0.3


# ---- 3. closed-form cases (plain trigonometry) --------------------------------------------------

def _one_building(alpha_deg: float, lateral_m: float, right, left=((), (), ())) -> Canyon:
    params = {"width_m": 20.0, "azimuth_deg": alpha_deg, "lateral_m": lateral_m,
              "antenna_height_m": 1.5, "depth_m": 15.0}
    return Canyon.from_buildings(params, left, right)


def test_facade_across_the_street() -> None:
    c = _one_building(30.0, 2.0, right=([-5.0], [5.0], [20.0]))
    # plain trigonometry: facade at w = 10, antenna at w = 2 -> 8 m away, 18.5 m above the antenna
    # (1e-9: float rounding)
    assert c.mask_elevation_deg(120.0) == pytest.approx(math.degrees(math.atan(18.5 / 8.0)), abs=1e-9)
    # 10 deg off the perpendicular the ray meets the facade at 8/cos(10 deg) (still on it: 1.4 m along)
    assert c.mask_elevation_deg(110.0) == pytest.approx(
        math.degrees(math.atan(18.5 * math.cos(math.radians(10.0)) / 8.0)), abs=1e-9)
    # the opposite side is empty, and a driving terminal 50 m further faces no building
    assert c.mask_elevation_deg(300.0) == -90.0
    assert c.mask_elevation_deg(120.0, along_m=np.array([0.0, 50.0])).tolist()[1] == -90.0


def test_looking_along_the_street_and_low_roofs() -> None:
    c = _one_building(30.0, 0.0, right=([-50.0, 0.0], [0.0, 50.0], [30.0, 30.0]),
                      left=([-50.0], [50.0], [1.0]))
    # plain trigonometry: a ray along the street axis never leaves the street (no end buildings)
    assert c.mask_elevation_deg(np.array([30.0, 210.0])).tolist() == [-90.0, -90.0]
    # a roof (1 m) below the antenna (1.5 m) blocks no ray at or above the horizon
    assert c.mask_elevation_deg(300.0) == -90.0


def test_end_wall_seen_through_a_gap() -> None:
    c = _one_building(0.0, 0.0, right=([10.0], [30.0], [21.5]))
    # plain trigonometry: at 60 deg from the axis the ray crosses the facade plane w = 10 at
    # u = 5.77 (a gap), then enters the end wall u = 10 at w = 17.3 after 10/cos(60) = 20 m
    assert c.mask_elevation_deg(60.0) == pytest.approx(math.degrees(math.atan(20.0 / 20.0)), abs=1e-9)
    # 2-D cut along the facade line: near edge 10 m ahead, 20 m above the antenna -> tan = 2
    assert c.half_line_cut_tan(1, np.array([0.0, 20.0])).tolist() == pytest.approx([2.0, 0.0])


# ---- 4. laws ------------------------------------------------------------------------------------

@pytest.mark.parametrize("law, kw, mean, sd", [
    # sd from the handbook moments (from memory, standard): exponential sd = mean; lognormal
    # sd = mean sqrt(exp(sigma^2) - 1); Pareto I sd^2 = xm^2 a / ((a-1)^2 (a-2)), xm = 12 here;
    # empirical: weighted mean 16.25 and variance 456.25 - 16.25^2 of the table below.
    ("exponential", {}, 20.0, 20.0),
    ("lognormal", {"sigma": 0.5}, 20.0, 20.0 * math.sqrt(math.expm1(0.25))),
    ("pareto", {"shape": 2.5}, 20.0, math.sqrt(144.0 * 2.5 / (1.5 ** 2 * 0.5))),
    ("empirical", {"values": [5.0, 10.0, 40.0], "weights": [1.0, 2.0, 1.0]}, 16.25,
     math.sqrt(456.25 - 16.25 ** 2)),
])
def test_law_sample_means(law: str, kw: dict, mean: float, sd: float) -> None:
    n = 200_000
    rng = np.random.default_rng(11)
    x = sample_law(rng, law, 20.0, kw.get("sigma", 0.5), kw.get("shape", 2.5),
                   kw.get("values"), kw.get("weights"), n)
    # Monte Carlo error: standard error sd/sqrt(n) (CLT; the Pareto variance is finite for a > 2);
    # 5 standard errors leave a false-failure chance below 1e-6
    assert abs(x.mean() - mean) < 5.0 * sd / math.sqrt(n)


def test_law_shapes_against_scipy() -> None:
    rng = np.random.default_rng(12)
    n = 20_000
    # Sources: lognormal with E = exp(mu + sigma^2/2) (handbook moment); Pareto type I mean
    # a xm / (a - 1) (handbook moment), so xm = mean (a-1)/a; reference laws from scipy.stats.
    ln = sample_law(rng, "lognormal", 20.0, 0.5, 2.5, None, None, n)
    ref_ln = stats.lognorm(0.5, scale=20.0 * math.exp(-0.125))
    assert stats.kstest(ln, ref_ln.cdf).pvalue > ALPHA
    pa = sample_law(rng, "pareto", 20.0, 0.5, 2.5, None, None, n)
    ref_pa = stats.pareto(2.5, scale=20.0 * 1.5 / 2.5)
    assert stats.kstest(pa, ref_pa.cdf).pvalue > ALPHA
    assert ref_pa.mean() == pytest.approx(20.0, rel=1e-12)  # Pareto mean = height_mean_m
    assert ref_ln.mean() == pytest.approx(20.0, rel=1e-12)
    assert sample_law(rng, "deterministic", 7.0, 0.5, 2.5, None, None, 3).tolist() == [7.0] * 3


# ---- 5. bad input -------------------------------------------------------------------------------

def _table(**kw) -> dict:
    return check_table({"width_m": 10.0, **kw}, KEYS, "demo.toml", "terminal[0].canyon")


@pytest.mark.parametrize("kw, key, shown", [
    ({"lateral_m": 6.0}, "lateral_m", "6.0"),
    ({"height_law": "empirical"}, "height_values_m", "None"),
    ({"length_law": "empirical", "length_values_m": [5.0, 10.0], "length_weights": [1.0]},
     "length_weights", "[1.0]"),
    ({"height_law": "pareto", "height_shape": 1.0}, "height_shape", "1.0"),
    ({"height_law": "empirical", "height_values_m": [5.0], "height_weights": [0.0]},
     "height_weights", "[0.0]"),
])
def test_check_names_key_and_value(kw: dict, key: str, shown: str) -> None:
    # common practice: the one-line message names the file, the key path and the value
    with pytest.raises(InputError) as err:
        check(_table(**kw), "demo.toml", "terminal[0]")
    assert f"demo.toml: terminal[0].canyon.{key} = {shown}:" in str(err.value)


def test_defaults_pass() -> None:
    p = _table()
    check(p, "demo.toml", "terminal[0]")  # must not raise
    assert p["height_law"] == "lognormal" and p["buildings_per_km"] == 60.0
