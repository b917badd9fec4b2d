"""Populations (``[[area]]``): how terminals are laid, how they run, and bad input.

Checks, each against something outside the project (named beside it):

- the area of a latitude/longitude box against the zone-area formula of spherical geometry,
  and of a polygon against a Monte Carlo of uniform points on the sphere (Marsaglia's normal
  vectors) counted by matplotlib's point-in-polygon test;
- grid spacing against great-circle (haversine) distances, and the grid's count against the
  area over spacing squared (one point per spacing_km**2, within the lattice-point boundary
  bound);
- random points against Archimedes' hat-box theorem (equal bands of sin(latitude) hold equal
  area): a chi-square test (scipy);
- polygon grids against matplotlib's point-in-polygon test;
- the mean number in view per latitude over an area spanning 0-60 deg against the
  latitude-density integral of inclined circular orbits (dwell.analysis.analytic, the
  handbook formula);
- accounting: a population's total handover count is the sum over its terminals; generated
  terminals give exactly the tables of the same terminals listed by hand; the tables do not
  depend on --workers or on the dask executor (byte for byte);
- bad input (README contract): one line naming file, key and value, exit status 2, nothing
  written.

Cost: the runs use a 720-satellite Walker shell for one or two hours over a few dozen
terminals; about 40 s in all (the dask case starts a local cluster).
"""

from __future__ import annotations

import copy
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tomli_w
from click.testing import CliRunner
from matplotlib.path import Path as MplPath
from scipy import stats

from dwell.cli import main
from dwell.io.areas import MAX_TERMINALS, Region, grid_points, polygon_area_km2, random_points
from dwell.io.config import load_scenario, scenario_from_dict
from dwell.orbits.frames import MEAN_EARTH_RADIUS_KM

R_KM = MEAN_EARTH_RADIUS_KM
START = "2027-05-10T00:00:00Z"
SHELL = {"kind": "walker-delta", "name": "lark", "satellites": 720, "planes": 36,
         "phasing": 1, "altitude_km": 600, "inclination_deg": 55}
POLICIES = [{"name": "he", "rule": "highest-elevation", "hysteresis_deg": 3},
            {"name": "a3", "rule": "a3", "time_to_trigger_s": 0.32}]


def _raw(areas: list[dict], terminals: list[dict] | None = None, duration_s: float = 3600,
         **scenario) -> dict:
    raw = {"scenario": {"start": START, "duration_s": duration_s, **scenario},
           "constellation": [dict(SHELL)], "policy": copy.deepcopy(POLICIES),
           "area": areas}
    if terminals:
        raw["terminal"] = terminals
    return raw


def _scenario(raw: dict, build: bool = False):
    return scenario_from_dict(copy.deepcopy(raw), "test.toml", Path("."), build=build)


def _haversine_km(lat1, lon1, lat2, lon2) -> np.ndarray:
    # great-circle distance, the haversine formula (R. W. Sinnott, Sky & Telescope 68, 1984)
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    a = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * R_KM * np.arcsin(np.sqrt(a))


# ---- areas and grids --------------------------------------------------------------------------

def test_box_area_is_the_zone_formula():
    # spherical geometry (zone between two parallels cut by two meridians):
    # A = R^2 (lon2 - lon1 in rad) (sin lat2 - sin lat1)
    for lat1, lat2, lon1, lon2 in [(0, 60, 0, 40), (-30, 10, 100, 190), (80, 90, -180, 180)]:
        want = R_KM ** 2 * math.radians(lon2 - lon1) * (
            math.sin(math.radians(lat2)) - math.sin(math.radians(lat1)))
        box = Region(lat1, lat2, lon1, lon2)
        poly = np.array([[lat1, lon1], [lat1, lon2], [lat2, lon2], [lat2, lon1]], float)
        # the closed forms agree to rounding (1e-12 relative)
        assert box.area_km2() == pytest.approx(want, rel=1e-12)
        assert polygon_area_km2(poly) == pytest.approx(want, rel=1e-12)


def test_polygon_area_against_monte_carlo_on_the_sphere():
    # uniform points on the sphere: normalised 3-D normal vectors (Marsaglia 1972); the share
    # inside the polygon (matplotlib's point-in-polygon test on lon/lat) times 4 pi R^2
    poly = np.array([[10.0, 0.0], [55.0, 20.0], [30.0, 35.0], [25.0, 15.0]])
    rng = np.random.default_rng(12345)
    n = 2_000_000
    xyz = rng.normal(size=(n, 3))
    xyz /= np.linalg.norm(xyz, axis=1)[:, None]
    lat = np.degrees(np.arcsin(xyz[:, 2]))
    lon = np.degrees(np.arctan2(xyz[:, 1], xyz[:, 0]))
    ring = np.vstack([poly[:, ::-1], poly[:1, ::-1]])
    p = MplPath(ring).contains_points(np.column_stack([lon, lat])).mean()
    want = p * 4 * math.pi * R_KM ** 2
    sigma = math.sqrt(p * (1 - p) / n) * 4 * math.pi * R_KM ** 2
    # binomial Monte Carlo error: 4 standard deviations
    assert abs(polygon_area_km2(poly) - want) < 4 * sigma


def test_grid_spacing_is_the_distance_along_parallels_and_meridians():
    region = Region(0.0, 70.0, -10.0, 30.0)
    s = 250.0
    lat, lon = grid_points(region, s)
    rows = np.unique(lat)
    # rows s apart along the meridian: the great-circle distance between two points of one
    # meridian is R times their latitude difference (haversine with dlon = 0)
    d_rows = _haversine_km(rows[:-1], 0.0, rows[1:], 0.0)
    assert np.allclose(d_rows, s, rtol=1e-12)
    for r in rows:
        x = np.sort(lon[lat == r])
        if x.size < 2:
            continue
        # along the parallel the arc is R cos(lat) dlon = s; the great circle between the
        # same points is shorter by s^3 tan^2(lat) / (24 R^2) to leading order (the series of
        # 2 R asin(cos(lat) sin(dlon / 2)) in dlon); the next order is (s / R)^2 ~ 0.2 % of
        # that, so 1 % covers it
        d = _haversine_km(r, x[:-1], r, x[1:])
        arc = R_KM * np.cos(np.radians(r)) * np.radians(np.diff(x))
        assert np.allclose(arc, s, rtol=1e-9)
        short = s ** 3 * math.tan(math.radians(r)) ** 2 / (24 * R_KM ** 2)
        assert np.allclose(s - d, short, rtol=0.01, atol=1e-9)


def test_grid_count_is_area_over_spacing_squared():
    # an equal-area grid holds one point per s^2 of the sphere; per row the count is
    # floor(width / s) + 1 and the rows cover the latitude extent to within half a spacing at
    # either edge, so |N - A / s^2| <= rows + widest row / s (lattice-point boundary bound)
    for region, s in [(Region(0.0, 60.0, 0.0, 40.0), 100.0),
                      (Region(-45.0, 45.0, 90.0, 200.0), 333.0)]:
        lat, _ = grid_points(region, s)
        rows = np.unique(lat).size
        widest = R_KM * math.radians(region.lon_max_deg - region.lon_min_deg)
        assert abs(lat.size - region.area_km2() / s ** 2) <= rows + widest / s


def test_polygon_grid_is_the_box_grid_inside_the_polygon():
    # reference: matplotlib's point-in-polygon test applied to the bounding box's grid
    poly = np.array([[40.13, 2.07], [49.71, 3.31], [48.27, 17.93], [44.41, 11.17],
                     [41.03, 19.61]])                       # concave (a notch from the east)
    region = Region(poly[:, 0].min(), poly[:, 0].max(), poly[:, 1].min(), poly[:, 1].max(),
                    poly)
    lat, lon = grid_points(region, 40.0)
    blat, blon = grid_points(Region(region.lat_min_deg, region.lat_max_deg,
                                    region.lon_min_deg, region.lon_max_deg), 40.0)
    ring = np.vstack([poly[:, ::-1], poly[:1, ::-1]])
    keep = MplPath(ring).contains_points(np.column_stack([blon, blat]))
    assert keep.sum() > 100
    assert np.array_equal(lat, blat[keep]) and np.array_equal(lon, blon[keep])


def test_random_points_are_uniform_in_area():
    # Archimedes' hat-box theorem: bands of equal sin(latitude) width hold equal area, so
    # uniform-in-area points fall equally into them (and uniformly in longitude)
    region = Region(0.0, 60.0, -20.0, 20.0)
    lat, lon = random_points(region, 20_000, seed_value=99)
    s = np.sin(np.radians(lat))
    edges = np.linspace(0.0, math.sin(math.radians(60.0)), 11)
    counts = np.histogram(s, edges)[0]
    # chi-square goodness of fit (scipy); with a fixed seed the p-value is fixed, and a
    # 1e-3 threshold would fail an exact sampler once in a thousand seeds
    assert stats.chisquare(counts).pvalue > 1e-3
    assert stats.chisquare(np.histogram(lon, np.linspace(-20, 20, 11))[0]).pvalue > 1e-3
    # a plain uniform latitude would crowd the poleward bands: the test can tell
    wrong = np.histogram(np.sin(np.radians(np.random.default_rng(99).uniform(0, 60, 20_000))),
                         edges)[0]
    assert stats.chisquare(wrong).pvalue < 1e-6
    # inside a polygon every point is inside (matplotlib's test)
    poly = np.array([[5.0, -15.0], [55.0, 0.0], [5.0, 15.0]])
    plat, plon = random_points(Region(5.0, 55.0, -15.0, 15.0, poly), 3000, seed_value=5)
    assert plat.size == 3000
    assert MplPath(np.vstack([poly[:, ::-1], poly[:1, ::-1]])).contains_points(
        np.column_stack([plon, plat])).all()


# ---- generated terminals ----------------------------------------------------------------------

def test_names_weights_and_seeds():
    box = {"lat_min_deg": 40, "lat_max_deg": 42, "lon_min_deg": 0, "lon_max_deg": 3}
    listed = [{"name": "harbour-field", "lat_deg": 44.2, "lon_deg": 8.9}]
    raw = _raw([{"name": "plain", **box, "spacing_km": 50, "density_per_km2": 30.0},
                {"name": "dots", **box, "count": 7}], listed)
    scen = _scenario(raw)
    names = scen.terminal_names()
    assert names[0] == "harbour-field"             # listed terminals first, then areas
    assert names[1] == "plain-001" and names[-1] == "dots-007"
    pop = scen.population
    assert pop.first_index == 1 and len(pop) == len(names) - 1
    # density_per_km2: a grid point stands for spacing^2 (the grid's definition above)
    assert np.allclose(pop.weight[pop.area == "plain"], 30.0 * 50.0 ** 2)
    assert np.all(pop.weight[pop.area == "dots"] == 1.0)      # default weight
    # random points follow the scenario seed; an integer seed fixes them
    dots = lambda s: s.population.lat_deg[s.population.area == "dots"]  # noqa: E731
    other = _scenario({**raw, "scenario": {**raw["scenario"], "seed": 5}})
    assert not np.array_equal(dots(scen), dots(other))
    fixed = copy.deepcopy(raw)
    fixed["area"][1]["seed"] = 3
    fixed2 = copy.deepcopy(fixed)
    fixed2["scenario"]["seed"] = 5
    assert np.array_equal(dots(_scenario(fixed)), dots(_scenario(fixed2)))
    follows = copy.deepcopy(raw)
    follows["area"][1]["seed"] = "scenario"
    assert np.array_equal(dots(_scenario(follows)), dots(scen))
    # the density weight of random points: the area's total is density x area
    dense = copy.deepcopy(raw)
    dense["area"][1]["density_per_km2"] = 2.0
    d = _scenario(dense)
    w = d.population.weight[d.population.area == "dots"]
    assert w.sum() == pytest.approx(2.0 * Region(40, 42, 0, 3).area_km2(), rel=1e-12)


def test_run_toml_holds_the_area_and_repeats_it(tmp_path):
    raw = _raw([{"name": "plain", "lat_min_deg": 40, "lat_max_deg": 41, "lon_min_deg": 0,
                 "lon_max_deg": 2, "count": 5, "min_elevation_deg": 30,
                 "canyon": {"width_m": 20, "azimuth_deg": 10}}])
    scen = _scenario(raw, build=True)
    resolved = scen.resolved()
    assert "terminal" not in resolved and [a["name"] for a in resolved["area"]] == ["plain"]
    again = scenario_from_dict(copy.deepcopy(resolved), "run.toml", Path("."), build=True)
    assert again.terminals == scen.terminals
    assert again.config_hash() == scen.config_hash()
    # every point has a canyon of its own: seeds derive from the terminal index (as listed
    # terminals' do), so two points' buildings differ
    c1, c2 = (s.obstructions[0].canyon for s in scen.sites[:2])
    assert c1.seed != c2.seed


def _run(folder: Path, raw: dict, *extra: str, out: str = "out"):
    cfg = folder / "scenario.toml"
    cfg.write_text(tomli_w.dumps(raw))
    result = CliRunner().invoke(main, ["run", str(cfg), "-o", str(folder / out), *extra])
    assert result.exit_code == 0, (result.output, result.exception)
    return folder / out


BOX = {"name": "plain", "lat_min_deg": 40, "lat_max_deg": 50, "lon_min_deg": 0,
       "lon_max_deg": 20, "spacing_km": 400, "min_elevation_deg": 25}


@pytest.fixture(scope="module")
def area_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("area")
    raw = _raw([{**BOX, "density_per_km2": 5.0}],
               [{"name": "harbour-field", "lat_deg": 44.2, "lon_deg": 8.9}])
    return folder, raw, _run(folder, raw, "--workers", "1")


def test_generated_terminals_run_like_listed_ones(area_run, tmp_path):
    _, raw, out = area_run
    scen = _scenario(raw)
    listed = copy.deepcopy(raw)
    del listed["area"]
    listed["terminal"] = [{k: v for k, v in t.items() if v is not None}
                          for t in scen.terminals]
    out2 = _run(tmp_path, listed, "--workers", "1")
    for name in ("summary", "links", "handovers", "outages", "visible", "passes"):
        a, b = pd.read_parquet(out / f"{name}.parquet"), pd.read_parquet(out2 / f"{name}.parquet")
        pd.testing.assert_frame_equal(a, b, check_exact=True)
    m = pd.read_parquet(out / "map.parquet")
    gen = scen.terminals[1:]
    assert len(m) == len(gen) * len(POLICIES)
    assert list(m["terminal"].drop_duplicates()) == [t["name"] for t in gen]
    assert np.array_equal(m["lat_deg"].to_numpy()[::2], [t["lat_deg"] for t in gen])
    assert np.allclose(m["weight"], 5.0 * 400.0 ** 2)


def test_population_total_is_the_sum_over_its_terminals(area_run):
    # accounting: the area's totals are sums of its terminals' rows and of the handover records
    _, _, out = area_run
    areas = pd.read_parquet(out / "areas.parquet")
    summary = pd.read_parquet(out / "summary.parquet")
    hos = pd.read_parquet(out / "handovers.parquet")
    mine = summary["terminal"].astype(str).str.startswith("plain-")
    for _, row in areas.iterrows():
        s = summary[mine & (summary["policy"].astype(str) == row["policy"])]
        h = hos[hos["terminal"].astype(str).str.startswith("plain-")
                & (hos["policy"].astype(str) == row["policy"])]
        assert row["terminals"] == len(s) > 10
        assert row["handovers"] == s["handovers"].sum() == len(h)
        assert row["satellite_changes"] == (h["scope"] == "inter-satellite").sum()
        w = 5.0 * 400.0 ** 2
        assert row["handovers_weighted"] == pytest.approx(w * len(h), rel=1e-12)
        assert row["handovers_per_hour_mean"] == pytest.approx(
            s["handovers_per_hour"].mean(), rel=1e-12)       # equal weights: the plain mean


def test_plot_draws_maps_and_load(area_run):
    _, _, out = area_run
    result = CliRunner().invoke(main, ["plot", str(out)])
    assert result.exit_code == 0, (result.output, result.exception)
    for name in ("map.png", "map_policies.png", "load.png"):
        data = (out / "plots" / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"          # the PNG signature (RFC 2083)
    # the per-terminal figures keep the listed terminal and the chosen one (by default the
    # last): the dwell CCDF has one panel per terminal, two here (not one per area point)
    from dwell.analysis.figures import check_choice, render_run
    panels = []

    def count(fig) -> bytes:
        panels.append(len(fig.axes))
        return b""
    names = [f.name for f in render_run(out, check_choice(out, None, None, None), finish=count)]
    assert names[0] == "dwell_ccdf.png" and panels[0] == 2


def test_report_shows_areas_by_their_means_and_latitude_bands(area_run):
    # the report of an area run keeps the listed terminal's rows and shows the area by its
    # areas.parquet row and its latitude bands, not one row per generated terminal; the
    # bands' terminal counts add up to the area's (accounting)
    from dwell.analysis.report import report_run
    _, _, out = area_run
    page = report_run(out).read_text()
    assert 'id="areas-table"' in page and 'id="bands-table"' in page
    assert "harbour-field" in page and "plain-001" not in page.split('id="figures"')[0]
    body = page.split('id="bands-table"')[1].split("</table>")[0]
    counts = [int(c) for c in re.findall(r'lat -?\d+\.\.-?\d+</td><td class="num">(\d+)<',
                                         body)]
    n_area = int(pd.read_parquet(out / "areas.parquet")["terminals"].iloc[0])
    bands = body.count("mean in view</td>")           # one row of each quantity per band
    quantities = len(counts) // bands
    assert bands > 1 and sum(counts) == n_area * quantities


def test_tables_do_not_depend_on_workers_or_executor(area_run, tmp_path):
    pytest.importorskip("dask.distributed")
    folder, raw, out = area_run
    two = _run(tmp_path, raw, "--workers", "2", out="two")
    dask = _run(tmp_path, raw, "--executor", "dask", "--workers", "2", out="dask")
    files = sorted(p.name for p in out.iterdir() if p.suffix == ".parquet")
    assert {"map.parquet", "areas.parquet", "load.parquet", "load_peaks.parquet",
            "load_bursts.parquet"} <= set(files)
    for other in (two, dask):
        for name in files + ["summary.txt"]:
            assert (other / name).read_bytes() == (out / name).read_bytes(), (other, name)


# ---- mean in view against the latitude density of inclined circular orbits -----------------

def test_mean_in_view_per_latitude_matches_walker_density(tmp_path):
    from sgp4.api import SatrecArray

    from dwell.analysis.analytic import cap_half_angle_rad, walker_mean_in_view

    area = {"name": "band", "lat_min_deg": 0, "lat_max_deg": 60, "lon_min_deg": 0,
            "lon_max_deg": 40, "spacing_km": 1000, "min_elevation_deg": 25}
    raw = _raw([area], duration_s=7200, measurement_period_s=10.0)
    raw["policy"] = raw["policy"][:1]
    out = _run(tmp_path, raw, "--workers", "1")
    m = pd.read_parquet(out / "map.parquet")
    scen = load_scenario(out / "run.toml")
    # the formula's sphere matched to the run: each shell's mean SGP4 radius over one orbit,
    # each site's geocentric latitude and radius on the WGS-84 ellipsoid
    sats = [s.satrec for s in scen.constellation.satellites]
    t = np.linspace(0.0, 2 * math.pi / (sats[0].no_kozai / 60.0), 97)
    jd, fr = scen.epoch.julian(t)
    _, r, _ = SatrecArray(sats).sgp4(jd, fr)
    r_sat = float(np.nanmean(np.linalg.norm(r, axis=-1)))
    names = scen.terminal_names()
    lats = sorted(m["lat_deg"].unique())
    assert len(lats) >= 6 and lats[0] < 5 and lats[-1] > 55
    for lat in lats:
        g = m[m["lat_deg"] == lat]
        want = []
        for term in g["terminal"].astype(str):
            pos = scen.sites[names.index(term)].motion.ecef(np.zeros(1))[0][0]
            r_site = float(np.linalg.norm(pos))
            lat_c = math.degrees(math.asin(pos[2] / r_site))
            want.append(walker_mean_in_view(720, 55.0, lat_c,
                                            float(cap_half_angle_rad(25.0, r_sat, r_site))))
        sim = g["mean_in_view"].to_numpy(dtype=float)
        se = sim.std(ddof=1) / math.sqrt(sim.size) if sim.size > 1 else 0.0
        # tolerance: SGP4's J2 orbits are not the formula's ideal circles - the short-period
        # radius change (about 10 km, largest at high latitude) moves the cap's edge by about
        # 0.1 deg, 1-2 % of the count, most where the satellites crowd near their inclination
        # (about 2.3 % at 57 deg here): 3 %; plus the time sampling of two hours at a few
        # longitudes, three standard errors of the row's mean
        assert sim.mean() == pytest.approx(np.mean(want), rel=0.03, abs=3 * se), lat


# ---- bad input --------------------------------------------------------------------------------

def _files(folder: Path) -> set[Path]:
    return {p.relative_to(folder) for p in folder.rglob("*")}


def _rejects(tmp_path: Path, area: dict, *needles: str) -> str:
    """README contract: status 2, one line on stderr naming file/key/value, nothing written."""
    raw = _raw([area])
    cfg = tmp_path / "scenario.toml"
    cfg.write_text(tomli_w.dumps(raw))
    before = _files(tmp_path)
    result = CliRunner().invoke(main, ["run", str(cfg), "-o", str(tmp_path / "out")])
    assert result.exit_code == 2, (result.exit_code, result.output, result.exception)
    assert result.stdout == ""
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr
    for needle in ("scenario.toml",) + needles:
        assert needle in lines[0], (needle, lines[0])
    assert _files(tmp_path) == before
    return lines[0]


BOX_KEYS = {"lat_min_deg": 40, "lat_max_deg": 50, "lon_min_deg": 0, "lon_max_deg": 20}
AREA_CASES = [
    # a polygon is a closed ring of at least three vertices (plane geometry)
    ("empty-polygon", {"name": "a", "polygon": [], "count": 5}, ["area[1].polygon", "[]",
                                                                 "at least 3"]),
    ("two-vertices", {"name": "a", "polygon": [[0, 0], [1, 1]], "count": 5},
     ["area[1].polygon", "at least 3"]),
    # a bow-tie: edges 0 and 2 cross (segment-intersection test, Cormen et al. sec. 33.1)
    ("self-intersecting", {"name": "a", "polygon": [[0, 0], [10, 10], [0, 10], [10, 0]],
                           "count": 5}, ["area[1].polygon", "crosses itself", "edges 0 and 2"]),
    # a ring that folds back on itself along one line
    ("folded", {"name": "a", "polygon": [[0, 0], [0, 10], [0, 5], [5, 5]], "count": 5},
     ["area[1].polygon", "crosses itself"]),
    ("collinear", {"name": "a", "polygon": [[0, 0], [1, 1], [2, 2]], "count": 5},
     ["area[1].polygon", "encloses no area"]),
    ("vertex-not-a-pair", {"name": "a", "polygon": [[0, 0], [1], [2, 2]], "count": 5},
     ["area[1].polygon[1]", "[1]"]),
    ("vertex-latitude", {"name": "a", "polygon": [[0, 0], [95, 1], [2, 2]], "count": 5},
     ["area[1].polygon[1]", "[95, 1]", "latitude"]),
    # the limit stated in dwell/io/areas.py (MAX_TERMINALS), with the estimate in the message:
    # 10 x 20 deg at 45 deg latitude is about 1.7e6 km2, at 1 km spacing about 1.7 million
    ("spacing-too-fine", {"name": "a", **BOX_KEYS, "spacing_km": 1.0},
     ["area[1].spacing_km", "= 1.0", "would generate about", f"at most {MAX_TERMINALS:,}"]),
    ("count-too-large", {"name": "a", **BOX_KEYS, "count": MAX_TERMINALS + 1},
     ["area[1].count", str(MAX_TERMINALS + 1), f"at most {MAX_TERMINALS:,}"]),
    # a population weight is a non-negative finite number (common practice)
    ("negative-weight", {"name": "a", **BOX_KEYS, "count": 5, "weight": -1.0},
     ["area[1].weight", "-1.0", ">= 0"]),
    ("nan-weight", {"name": "a", **BOX_KEYS, "count": 5, "weight": math.nan},
     ["area[1].weight", "nan", "finite"]),
    ("negative-density", {"name": "a", **BOX_KEYS, "count": 5, "density_per_km2": -3},
     ["area[1].density_per_km2", "-3"]),
    ("box-and-polygon", {"name": "a", **BOX_KEYS, "polygon": [[0, 0], [1, 0], [0, 1]],
                         "count": 5}, ["area[1].lat_min_deg", "not both"]),
    ("no-region", {"name": "a", "count": 5}, ["area[1].lat_min_deg", "box"]),
    ("spacing-and-count", {"name": "a", **BOX_KEYS, "count": 5, "spacing_km": 100},
     ["area[1].spacing_km", "one of them"]),
    ("neither-spacing-nor-count", {"name": "a", **BOX_KEYS}, ["area[1].count", "spacing_km"]),
    ("box-upside-down", {"name": "a", **{**BOX_KEYS, "lat_min_deg": 55}, "count": 5},
     ["area[1].lat_min_deg", "55"]),
    ("track-in-template", {"name": "a", **BOX_KEYS, "count": 5, "track": "t.csv"},
     ["area[1].track", "'t.csv'"]),
    ("unknown-key", {"name": "a", **BOX_KEYS, "count": 5, "colour": "red"},
     ["area[1].colour", "'red'", "unknown key"]),
    ("template-value", {"name": "a", **BOX_KEYS, "count": 5, "min_elevation_deg": 95},
     ["area[1].min_elevation_deg", "95"]),
    # a chevron whose bounding box's only grid point (its centre) lies in the notch
    ("no-point-inside", {"name": "a", "polygon": [[0, 0], [1, 0.5], [0, 1], [0.9, 0.5]],
                         "spacing_km": 500}, ["area[1].spacing_km", "no grid point"]),
]


@pytest.mark.parametrize("area, needles", [c[1:] for c in AREA_CASES],
                         ids=[c[0] for c in AREA_CASES])
def test_bad_area(tmp_path, area, needles):
    _rejects(tmp_path, area, *needles)


def test_generated_name_taken_by_a_listed_terminal(tmp_path):
    raw = _raw([{"name": "a", **BOX_KEYS, "count": 3}],
               [{"name": "a-002", "lat_deg": 1.0, "lon_deg": 2.0}])
    cfg = tmp_path / "scenario.toml"
    cfg.write_text(tomli_w.dumps(raw))
    result = CliRunner().invoke(main, ["run", str(cfg), "-o", str(tmp_path / "out")])
    assert result.exit_code == 2 and len(result.stderr.splitlines()) == 1
    assert "area[1].name = 'a'" in result.stderr and "a-002" in result.stderr
    assert not (tmp_path / "out").exists()


def test_scheduler_without_dask_executor(tmp_path):
    raw = _raw([{"name": "a", **BOX_KEYS, "count": 3}])
    cfg = tmp_path / "scenario.toml"
    cfg.write_text(tomli_w.dumps(raw))
    result = CliRunner().invoke(main, ["run", str(cfg), "-o", str(tmp_path / "out"),
                                       "--scheduler", "tcp://127.0.0.1:8786"])
    assert result.exit_code == 2 and len(result.stderr.splitlines()) == 1
    assert "--scheduler = 'tcp://127.0.0.1:8786'" in result.stderr
    assert not (tmp_path / "out").exists()


def test_readme_area_example_loads():
    # the README's [[area]] example (read out of the README itself) is a valid table, and so
    # is its commented polygon variant; a 100 km grid over the 10 x 20 deg box holds about
    # area / spacing^2 points (the README's rule), within the boundary bound used above
    import re
    import tomllib

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    section = readme.split("## Areas: populations of terminals", 1)[1].split("\n## ", 1)[0]
    text = re.findall(r"```toml\n(.*?)```", section, flags=re.S)[0]
    area = tomllib.loads(text)["area"][0]
    scen = _scenario(_raw([area]))
    region = Region(40, 50, 0, 20)
    rows = np.unique(scen.population.lat_deg).size
    assert abs(len(scen.terminals) - region.area_km2() / 100.0 ** 2) <= rows + 2300 / 100.0
    assert all(t["apertures"] == 2 and t["min_elevation_deg"] == 25 for t in scen.terminals)
    poly = re.search(r"# (polygon = \[\[.*\]\])", text).group(1)
    variant = {k: v for k, v in area.items() if not k.startswith(("lat_", "lon_"))}
    variant["polygon"] = tomllib.loads(poly)["polygon"]
    assert len(_scenario(_raw([variant])).terminals) > 50
