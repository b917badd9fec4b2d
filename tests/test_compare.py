"""dwell compare: the table's contract (columns, boolean verdicts, sources, geometry), runs
inside a sweep, ensembles over seeds, the SINR rows on a synthetic run folder, and the
[scenario] earth = "sphere" geometry."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import tomli_w
from click.testing import CliRunner
from scipy import stats

from dwell.analysis import compare as cmp_mod
from dwell.analysis.compare import COLUMNS, compare_run, format_comparison
from dwell.analysis.ensemble import is_seed_axis, pool
from dwell.cli import main
from dwell.io.config import scenario_from_dict
from dwell.io.errors import InputError
from dwell.orbits.frames import MEAN_EARTH_RADIUS_KM
from dwell.run import execute

START = "2027-05-10T00:00:00Z"
ISO = {"kind": "isotropic", "satellites": 240, "altitude_km": 900.0}  # drawn from the scenario seed
TERM = {"name": "flat", "lat_deg": 31.0, "lon_deg": 12.0, "min_elevation_deg": 15.0}
POLICIES = [{"name": "near", "rule": "highest-elevation"},
            {"name": "sticky", "rule": "highest-elevation", "hysteresis_deg": 2.0},
            {"name": "keep", "rule": "until-lost"}]


def _raw(duration_s=7200.0, **scenario):
    return {"scenario": {"start": START, "duration_s": duration_s, **scenario},
            "constellation": [dict(ISO)], "terminal": [dict(TERM)], "policy": POLICIES}


def _run(tmp: Path, name: str, raw: dict) -> Path:
    scen = scenario_from_dict(raw, str(tmp / f"{name}.toml"), tmp)
    out = tmp / name
    execute(scen, out, workers=1)
    return out


@pytest.fixture(scope="module")
def iso_run(tmp_path_factory) -> Path:
    return _run(tmp_path_factory.mktemp("iso"), "run", _raw())


def test_table_contract(iso_run, tmp_path):
    # The contract: documented columns, inside_interval boolean (null where there is
    # no verdict), a source named on every applicable row, the geometry said, and the text
    # saying that one run's intervals cover time sampling only.  (Consistency properties of
    # the table; the formulas themselves are checked against Monte Carlo elsewhere.)
    df = compare_run(iso_run)
    assert tuple(df.columns) == COLUMNS
    assert str(df["inside_interval"].dtype) == "boolean"
    ok = df[df["applicable"]]
    assert len(ok) >= 6
    assert (ok["source"].str.len() > 10).all()
    assert ok["geometry"].str.contains("WGS-84").all()
    inside = (ok["sim_lo"] <= ok["analytic"]) & (ok["analytic"] <= ok["sim_hi"])
    with_iv = ok[np.isfinite(ok["sim_lo"])]
    assert (with_iv["inside_interval"].astype(bool) == inside[with_iv.index]).all()
    na = df[~df["applicable"]]
    assert na["inside_interval"].isna().all() and na["note"].str.startswith("not applicable").all()
    # hysteresis is refused, the exact nearest-satellite rate and its planar limit are there
    q = df.set_index(["policy", "quantity"])
    assert not q.loc[("sticky", "handovers per hour"), "applicable"]
    assert q.loc[("near", "handovers per hour"), "source"].startswith("Rice's formula")
    assert "PLANAR LIMIT" in q.loc[("near", "handovers per hour, planar limit"), "note"]
    # the Earth rotates here: isotropic passes now have a formula (boundary flux with rotation)
    assert q.loc[("-", "passes per hour"), "applicable"]
    text = format_comparison(df)
    assert "time sampling only" in text
    # Parquet keeps the nullable boolean
    cmp_mod.write_comparison(df, tmp_path / "c.parquet")
    col = pq.read_table(tmp_path / "c.parquet").column("inside_interval")
    assert str(col.type) == "bool" and col.null_count == int(df["inside_interval"].isna().sum())


def test_cli_compare_writes_table_and_text(iso_run):
    res = CliRunner().invoke(main, ["compare", str(iso_run)])
    assert res.exit_code == 0, res.output
    assert (iso_run / "comparison.parquet").is_file() and (iso_run / "comparison.txt").is_file()
    assert "handovers per hour" in res.output


def _sweep(tmp: Path, seeds, duration_s=5400.0) -> Path:
    base = tmp / "base.toml"
    base.write_text(tomli_w.dumps(_raw(duration_s)))
    sweep = tmp / "sweep.toml"
    sweep.write_text(tomli_w.dumps({"sweep": {"base": str(base), "name": "seeds"},
                                    "axis": [{"key": "scenario.seed", "values": list(seeds)}]}))
    out = tmp / "out"
    res = CliRunner().invoke(main, ["sweep", str(sweep), "-o", str(out), "--workers", "1"])
    assert res.exit_code == 0, res.output
    return out


def test_sweep_runs_and_ensembles(tmp_path):
    # A run folder inside a sweep lacks visible/passes (they sit in the task folder): compare
    # must read them from there instead of failing.  The ensemble pools runs differing only in
    # seeds with a Student-t interval over the runs' values (scipy.stats.t as the reference).
    out = _sweep(tmp_path, [11, 12, 13])
    runs = sorted((out / "_runs").iterdir())
    assert len(runs) == 3 and not (runs[0] / "visible.parquet").exists()
    singles = [compare_run(r) for r in runs]
    res = CliRunner().invoke(main, ["compare", str(out)])
    assert res.exit_code == 0, res.output
    pooled = pd.read_parquet(out / "_comparison.parquet")
    assert (out / "_comparison.txt").is_file()
    # the combined summary still reads as before (the comparison files start with "_")
    assert len(pd.read_parquet(out)) == 3 * len(POLICIES)
    row = pooled.set_index(["policy", "quantity"]).loc[("-", "mean in view")]
    x = np.array([s.set_index(["policy", "quantity"]).loc[("-", "mean in view"), "simulated"]
                  for s in singles])
    lo, hi = stats.t.interval(0.95, x.size - 1, loc=x.mean(), scale=x.std(ddof=1) / math.sqrt(3))
    # tolerance: float rounding
    assert row["simulated"] == pytest.approx(x.mean(), rel=1e-12)
    assert (row["sim_lo"], row["sim_hi"]) == pytest.approx((lo, hi), rel=1e-12)
    assert row["runs"] == 3 and "Student-t" in row["interval"]
    assert "spread across seeds" in format_comparison(pooled)


def test_pool_refuses_rows_not_applicable_in_some_runs():
    # A row applies to an ensemble only if it applies to every run.
    a = cmp_mod.frame([cmp_mod._row("t", "-", "q", 1.0, 0.5, 1.5, 1.0, "iv", "src")])
    b = cmp_mod.frame([cmp_mod._na("t", "-", "q", "because")])
    out = pool([a, b])
    assert not out["applicable"].iloc[0] and "1 of 2 runs" in out["note"].iloc[0]
    assert is_seed_axis("scenario.seed") and is_seed_axis("constellation.wren.seed")
    assert not is_seed_axis("policy.*.hysteresis_db")


def test_sinr_rows_on_a_synthetic_run_folder(iso_run, tmp_path, monkeypatch):
    # The simulator's side (contract of the issue): sinr_ccdf.parquet with columns terminal,
    # policy, hour, sinr_db (-30..50 dB by 0.5), ccdf, rows.  Build one by hand with known
    # numbers and check the pooling: the simulated P(SINR > T) is sum(ccdf * rows) / sum(rows)
    # over the hours (computed here by hand), with an hour-bootstrap interval around it; the
    # applicability rules refuse hysteresis and a missing file.  The analytic value is checked
    # against Monte Carlo in tests/test_sinr_coverage.py.
    run = tmp_path / "run"
    run.mkdir()
    for f in iso_run.iterdir():
        if f.name != "sinr_ccdf.parquet":          # the missing-file case first
            (run / f.name).write_bytes(f.read_bytes())
    real_load = cmp_mod.load_scenario

    def with_interference(path, **kw):          # the [link] key the cells work adds
        scen = real_load(path, **kw)
        scen.link["interference"] = True
        return scen

    monkeypatch.setattr(cmp_mod, "load_scenario", with_interference)
    df = compare_run(run).set_index(["policy", "quantity"])
    assert "no sinr_ccdf.parquet" in df.loc[("near", "P(SINR > T dB)"), "note"]
    rng = np.random.default_rng(1)
    grid = np.arange(-30.0, 50.0 + 0.25, 0.5)
    rows = []
    for pol in ("near", "sticky", "keep"):
        for hour in range(2):
            served = int(rng.integers(2000, 3600))
            level = rng.uniform(-2.0, 12.0)
            ccdf = 1.0 / (1.0 + np.exp((grid - level) / 2.0))
            rows += [{"terminal": "flat", "policy": pol, "hour": hour, "sinr_db": g, "ccdf": c,
                      "rows": served} for g, c in zip(grid, ccdf)]
    table = pd.DataFrame(rows)
    table.to_parquet(run / "sinr_ccdf.parquet")
    df = compare_run(run).set_index(["policy", "quantity"])
    for t_db in (-5.0, 0.0, 5.0, 10.0):
        r = df.loc[("near", f"P(SINR > {t_db:g} dB)")]
        sel = table[(table["policy"] == "near") & np.isclose(table["sinr_db"], t_db)]
        want = float((sel["ccdf"] * sel["rows"]).sum() / sel["rows"].sum())
        assert r["applicable"] and r["simulated"] == pytest.approx(want, rel=1e-12)
        assert 0.0 <= r["analytic"] <= 1.0 and r["source"].startswith("conditional Laplace")
    assert "hysteresis" in df.loc[("sticky", "P(SINR > T dB)"), "note"]
    assert "not nearest" in df.loc[("keep", "P(SINR > T dB)"), "note"]


def test_earth_sphere_puts_sites_on_the_formulas_sphere(tmp_path):
    # [scenario] earth = "sphere": the site sits at 6371 km + its height from the centre (the
    # radius TR 38.821 uses) with up = the radial direction, so geodetic = geocentric latitude
    # (sphere geometry, common practice); the default stays WGS-84 (NIMA TR8350.2: 6378.137 km
    # at the equator).  tolerance: float rounding.
    raw = _raw(600.0, earth="sphere")
    raw["terminal"][0]["alt_m"] = 250.0
    scen = scenario_from_dict(raw, str(tmp_path / "s.toml"), tmp_path)
    r, _, basis = scen.sites[0].motion.ecef(np.zeros(1))
    assert np.linalg.norm(r[0]) == pytest.approx(MEAN_EARTH_RADIUS_KM + 0.25, rel=1e-14)
    np.testing.assert_allclose(basis[0, 2], r[0] / np.linalg.norm(r[0]), atol=1e-14)
    lat = math.degrees(math.asin(r[0][2] / np.linalg.norm(r[0])))
    assert lat == pytest.approx(TERM["lat_deg"], abs=1e-12)
    eq = _raw(600.0)
    eq["terminal"][0].update(lat_deg=0.0, alt_m=0.0)
    wgs = scenario_from_dict(eq, str(tmp_path / "w.toml"), tmp_path)
    assert np.linalg.norm(wgs.sites[0].motion.ecef(np.zeros(1))[0][0]) == pytest.approx(6378.137)
    with pytest.raises(InputError, match="scenario.earth"):
        scenario_from_dict(_raw(600.0, earth="flat"), str(tmp_path / "b.toml"), tmp_path)


def test_compare_says_which_earth(tmp_path):
    out = _run(tmp_path, "sph", _raw(3600.0, earth="sphere", earth_rotation=False))
    df = compare_run(out)
    ok = df[df["applicable"]]
    assert ok["geometry"].str.startswith("sphere of 6371 km").all()
    assert ok["geometry"].str.contains("Earth frozen").all()


def test_walker_pass_rows_match_the_simulation(tmp_path):
    # dwell's simulation of a Walker shell against the boundary-flux pass rate and Little's
    # law duration with the Earth's rotation (docs/inclined-shells.md), on the geometry the
    # run used.  One day of a 1,200-satellite shell at 45 deg N.  Tolerance 2 %: the formulas
    # are for ideal circular orbits; SGP4's J2 shifts the argument-of-latitude rate by ~0.2 %
    # and the radius by a few km (cap size < 1 %), and the mean-in-view check of
    # tests/test_analysis.py shows the same ~1-1.5 % model error in the duration's numerator;
    # a day averages the nodes over a full turn of the Earth.
    raw = {"scenario": {"start": START, "duration_s": 86400.0},
           "constellation": [{"kind": "walker-delta", "satellites": 1200, "planes": 40,
                              "phasing": 7, "altitude_km": 700.0, "inclination_deg": 60.0}],
           "terminal": [{"name": "mid", "lat_deg": 45.0, "lon_deg": 3.0,
                         "min_elevation_deg": 20.0}],
           "policy": [{"name": "keep", "rule": "until-lost"}]}
    out = _run(tmp_path, "walker", raw)
    df = compare_run(out).set_index(["policy", "quantity"])
    for q in ("passes per hour", "mean pass duration s"):
        r = df.loc[("-", q)]
        assert r["applicable"] and abs(r["rel_diff"]) < 0.02, (q, r["rel_diff"])
    assert "POISSON APPROXIMATION" in df.loc[("-", "fraction of time none in view"), "note"]
    assert df.loc[("keep", "handovers per hour"), "applicable"]


def test_time_average_of_fewer_than_three_hours_has_no_interval():
    # A bootstrap over clock hours resamples hours: with one or two hours it cannot show the
    # run's sampling error (common practice: a block bootstrap needs several blocks), so the
    # interval is unknown (NaN, "no interval", not judged) rather than a zero-width point.
    from dwell.analysis.compare import _ratio_ci, _sd_ci
    num, den = np.array([3500.0, 3300.0]), np.array([3600.0, 3600.0])
    assert all(np.isnan(_ratio_ci(num, den)))
    assert all(np.isnan(_sd_ci(num, num * 1.1, den)))
    lo, hi = _ratio_ci(np.array([3500.0, 3300.0, 3400.0, 3550.0]), np.full(4, 3600.0))
    assert lo < 3437.5 / 3600.0 < hi                 # the point estimate lies inside
    v = _ratio_ci(np.full(4, 1800.0), np.full(4, 3600.0))   # every hour alike: a point
    assert v == (0.5, 0.5)


def test_area_terminals_are_shown_by_latitude_band():
    # The text table of an area shows, per 1-degree latitude band, the arithmetic mean of its
    # terminals' simulated and analytic values and how many intervals hold the analytic
    # value; listed terminals keep their own lines (the mean is its definition; the counts
    # are counted here by hand).
    from dwell.analysis.compare import _row, format_comparison, frame
    q = "mean in view"
    rows = [_row("mill-field", "-", q, 15.0, 14.0, 16.0, 15.2, "iv", "src"),
            _row("vale-001", "-", q, 10.0, 9.0, 11.0, 10.5, "iv", "src"),     # inside
            _row("vale-002", "-", q, 12.0, 11.5, 12.5, 13.0, "iv", "src"),    # outside
            _row("vale-003", "-", q, 20.0, 19.0, 21.0, 20.0, "iv", "src")]    # inside
    places = pd.DataFrame({"terminal": ["vale-001", "vale-002", "vale-003"],
                           "area": ["vale"] * 3, "lat_deg": [44.2, 44.9, 45.1]})
    text = format_comparison(frame(rows), places=places)
    lines = text.splitlines()
    assert any(line.startswith("mill-field") for line in lines)
    assert not any(line.startswith("vale-00") for line in lines)
    band44 = next(line for line in lines if "lat 44..45 (2)" in line)
    assert "11 mean" in band44 and "11.75" in band44 and "1/2" in band44
    assert f"{11.0 / 11.75 - 1:+.2%}" in band44
    band45 = next(line for line in lines if "lat 45..46 (1)" in line)
    assert "20 mean" in band45 and "1/1" in band45


def test_sweep_bands_leave_out_terminals_that_move_between_runs(tmp_path):
    # Random points under a seed axis sit elsewhere in each run: their pooled rows have no
    # one latitude, so they are not banded (shown one by one); fixed grid points are.
    from dwell.analysis.compare import places_of
    for run, lat in (("a", 44.2), ("b", 45.7)):
        folder = tmp_path / "_runs" / run
        folder.mkdir(parents=True)
        pd.DataFrame({"terminal": ["vale-001", "vale-002"], "area": ["vale", "vale"],
                      "lat_deg": [40.0, lat], "lon_deg": [3.0, 3.0]}).to_parquet(
            folder / "map.parquet")
    places = places_of(tmp_path)
    assert places["terminal"].tolist() == ["vale-001"]
