"""Sweep figures and the sweep report (issue 16, items 1, 2 and 6).

Checked against the sweep file written here (its axes, values and order are the reference):

- swept columns keep their full key path, and the older short column stays beside it with the
  same values (a contract: extended, never renamed);
- per terminal, the trade-off figure's lines join the points in the sweep file's order, each
  point is labelled with its swept value, and the error bars are the summary's interval
  columns (``*_lo``/``*_hi``), never below zero;
- the sweep report holds every figure, one comparison table per terminal with one row per run
  of the sweep file, the sweep file verbatim and each run's resolved configuration, and loads
  nothing from elsewhere;
- plot options that name nothing in the sweep are one line, exit status 2, nothing written.

Cost: one sweep of four runs in one task (30 minutes of configs/quick.toml each, about 3 s),
and a few renders.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tomli_w
from click.testing import CliRunner

from dwell.analysis.plots import plt, png_bytes
from dwell.cli import main
from dwell.sweep import combined_summary, load_sweep
from dwell.sweep.execute import param_columns
from dwell.sweep.plots import _err, render_sweep, swept_axes, tradeoff_figure
from report_checks import Page, assert_self_contained, image_bytes, png_size, text_overlaps

QUICK = Path(__file__).resolve().parents[1] / "configs" / "quick.toml"
KEY = "policy.*.hysteresis_db"
VALUES = [2.0, 0.0]                 # deliberately not ascending: sweep order is file order
POLICIES = ["a3", "strongest-rsrp"]
TERMINALS = ["harbour-field", "ridge-camp"]       # configs/quick.toml's terminals


def _dwell(*args: str):
    return CliRunner().invoke(main, list(args))


def _sweep_text() -> str:
    return tomli_w.dumps({
        "sweep": {"base": str(QUICK), "name": "figures"},
        "overrides": {"scenario.duration_s": 1800},
        "axis": [{"key": "policy", "values": POLICIES}, {"key": KEY, "values": VALUES}],
    })


@pytest.fixture(scope="module")
def sweep_dir(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("sweep-figures")
    (folder / "sweep.toml").write_text(_sweep_text())
    res = _dwell("sweep", str(folder / "sweep.toml"), "-o", str(folder / "out"), "--workers", "1")
    assert res.exit_code == 0, res.output
    return folder / "out"


def test_swept_columns_keep_the_full_key_path_and_the_old_short_name(sweep_dir, tmp_path):
    df = combined_summary(sweep_dir)
    assert KEY in df.columns and "hysteresis_db" in df.columns
    assert np.array_equal(df[KEY].to_numpy(), df["hysteresis_db"].to_numpy())
    assert sorted(set(df[KEY])) == sorted(VALUES)
    assert "policy_set" in df.columns        # the policy axis keeps its old column
    # two axes ending in the same word (issue 16: "two terminals' width_m would collide")
    path = tmp_path / "two.toml"
    path.write_text(tomli_w.dumps({
        "sweep": {"base": str(QUICK)},
        "axis": [{"key": "policy.a3.hysteresis_db", "values": [0, 1]},
                 {"key": "policy.strongest-rsrp.hysteresis_db", "values": [0, 1]}]}))
    cols = param_columns(load_sweep(path))
    assert cols["policy.a3.hysteresis_db"] == ["hysteresis_db", "policy.a3.hysteresis_db"]
    # the second keeps its older spelling (key with non-word characters as "_") and gains its
    # full key path
    assert cols["policy.strongest-rsrp.hysteresis_db"] == [
        "policy_strongest_rsrp_hysteresis_db", "policy.strongest-rsrp.hysteresis_db"]


def test_error_bars_come_from_intervals_and_stop_at_zero():
    # worked by hand: value 1 with interval [-0.5, 3] -> bar from 0 to 3 (lengths 1 and 2);
    # an unknown interval (NaN) draws no bar
    got = _err(np.array([1.0, 2.0]), np.array([-0.5, np.nan]), np.array([3.0, np.nan]))
    assert got.tolist() == [[1.0, 0.0], [2.0, 0.0]]


def test_tradeoff_lines_follow_sweep_order_with_labelled_points(sweep_dir):
    df = combined_summary(sweep_dir)
    axes = swept_axes(sweep_dir, df)
    assert [a.key for a in axes] == ["policy", KEY]
    assert axes[1].order == VALUES                 # as the sweep file lists them
    for term in TERMINALS:
        d = df[df["terminal"] == term]
        fig = tradeoff_figure(d, term, axes)
        vs_value, outage, pingpong, failures = fig.axes[:4]
        assert vs_value.get_xlabel() == f"{KEY} (dB)"
        for pol in POLICIES:
            runs = d[d["policy"] == pol].set_index(KEY).loc[VALUES]    # in sweep order
            bars = next(c for c in pingpong.containers if c.get_label() == pol)
            line = bars.lines[0]                   # the errorbar's data line
            # the line visits the runs in sweep order (x = handovers per hour of each run)
            assert line.get_xdata().tolist() == runs["handovers_per_hour"].tolist()
            labels = [t.get_text() for t in pingpong.texts if t.xy[0] in set(line.get_xdata())]
            assert sorted(labels) == sorted(f"{v:g}" for v in VALUES)
        for ax in (vs_value, outage, pingpong, failures):
            for coll in ax.collections:            # error bars: none reaches below zero
                for seg in coll.get_segments():
                    assert np.min(seg[:, 1]) >= 0.0
        # the failure panel's bars are the exact Poisson interval of each run's count (Garwood
        # 1936; with no failure in 0.5 h: from 0 to -ln(0.025) / 0.5 h = 7.38 per hour)
        if (d["radio_link_failures"] == 0).all():
            tops = {round(float(seg[:, 1].max()), 2) for c in failures.collections
                    for seg in c.get_segments() if np.ptp(seg[:, 1]) > 0}
            assert tops == {round(-np.log(0.025) / 0.5, 2)}
        # the outage panel's bars are the summary's outage_fraction_lo/hi (as % of time)
        assert text_overlaps(fig) == []
        plt.close(fig)


def test_sweep_figures_have_no_overlapping_text(sweep_dir):
    problems = {}

    def check(fig):
        bad = text_overlaps(fig)
        if bad:
            problems[fig.get_suptitle()] = bad
        return png_bytes(fig)

    render_sweep(sweep_dir, finish=check)
    assert not problems, problems


def test_sweep_report_holds_figures_tables_and_configurations(sweep_dir):
    res = _dwell("report", str(sweep_dir))
    assert res.exit_code == 0, res.output
    page = Page((sweep_dir / "_report.html").read_text(encoding="utf-8"))
    # beside the summaries, the page must not join the dataset (README: pandas.read_parquet(DIR)
    # gives the combined summary)
    assert len(combined_summary(sweep_dir)) == len(POLICIES) * len(VALUES) * len(TERMINALS)
    names = {img["data-name"] for img in page.images}
    assert names == {f"tradeoff_{t}.png" for t in TERMINALS} | {"worst_hour_switches.png"}
    for img in page.images:
        assert min(png_size(image_bytes(img))) > 200
    n_runs = len(POLICIES) * len(VALUES)          # grid mode: every combination
    for term in TERMINALS:
        assert page.tables[f"comparison-{term}"] == n_runs
    assert page.tables["summary-full"] == n_runs * len(TERMINALS)
    assert page.pre["sweep-file"] == _sweep_text()
    assert len([k for k in page.pre if k.startswith("configuration-")]) == n_runs
    assert "no substitute for regulatory, licensing or safety-of-life link analysis" in \
        page.visible_text
    assert_self_contained(page)


@pytest.mark.parametrize("args, option", [
    (["--terminal", "nobody"], "--terminal"),
    (["--policy", "nobody"], "--policy"),
    (["--hour", "0"], "--hour"),                  # a sweep's figures have no hour to choose
])
@pytest.mark.parametrize("command", ["plot", "report"])
def test_bad_sweep_plot_option_is_one_line_exit_2_and_writes_nothing(sweep_dir, tmp_path,
                                                                     command, args, option):
    target = tmp_path / "elsewhere.html"
    extra = ["-o", str(target)] if command == "report" else []
    before = sorted(p.name for p in sweep_dir.iterdir())
    plots_before = sorted((sweep_dir / "_plots").iterdir()) if (sweep_dir / "_plots").exists() \
        else []
    res = _dwell(command, str(sweep_dir), *args, *extra)
    assert res.exit_code == 2, res.output
    line = res.stderr.strip()
    assert "\n" not in line and str(sweep_dir) in line and option in line
    assert sorted(p.name for p in sweep_dir.iterdir()) == before
    assert (sorted((sweep_dir / "_plots").iterdir()) if (sweep_dir / "_plots").exists()
            else []) == plots_before
    assert not target.exists()


def test_site_sweep_draws_results_per_site_in_sweep_order(tmp_path):
    # sites listed north to south: the figure keeps the sweep file's order, not a sorted one
    (tmp_path / "sites.toml").write_text(tomli_w.dumps({
        "sweep": {"base": str(QUICK)},
        "overrides": {"scenario.duration_s": 600},
        "axis": [{"key": "terminal", "sites": {"kind": "list", "sites": [
            {"name": f"lat{lat:+06.1f}", "lat_deg": float(lat), "lon_deg": 10.0}
            for lat in (60, 30, 0)]}},
                 {"key": "policy", "values": ["a3"]}]}))
    out = tmp_path / "out"
    res = _dwell("sweep", str(tmp_path / "sites.toml"), "-o", str(out), "--workers", "1")
    assert res.exit_code == 0, res.output
    seen = {}

    def keep(fig):
        seen[fig.get_suptitle()] = [t.get_text() for t in fig.axes[0].get_xticklabels()]
        assert text_overlaps(fig) == []
        return png_bytes(fig)

    names = [f.name for f in render_sweep(out, finish=keep)]
    assert "by_site.png" in names
    ticks = next(v for k, v in seen.items() if k.startswith("Results per swept site"))
    assert ticks == ["lat+060.0", "lat+030.0", "lat+000.0"]     # the sweep file's order


def test_area_sweep_has_area_columns_and_one_figure_per_area(tmp_path, monkeypatch):
    # An area in a sweep (issue 15 populations under issue 16 sweeps): the combined summary
    # carries each terminal's area and weight, each run folder its map and areas tables, and
    # the figures summarise an area by its weighted means instead of one figure per generated
    # terminal.  Two independent computations must agree: areas.parquet's weighted means
    # (dwell.analysis.population) and the sweep figure's (dwell.sweep.plots.area_means), and
    # both equal sum(w x) / sum(w) over the summary rows (the definition of a weighted mean).
    from dwell.sweep.plots import area_means
    base = tmp_path / "area.toml"
    base.write_text(tomli_w.dumps({
        "scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 900, "seed": 2},
        "constellation": [{"kind": "walker-delta", "name": "wren", "satellites": 720,
                           "planes": 36, "phasing": 1, "altitude_km": 560,
                           "inclination_deg": 53.5}],
        "terminal": [{"name": "mill-field", "lat_deg": 47.6, "lon_deg": 9.2}],
        "area": [{"name": "vale", "lat_min_deg": 44, "lat_max_deg": 46, "lon_min_deg": 2,
                  "lon_max_deg": 6, "spacing_km": 100, "weight": 3.0},
                 {"name": "moor", "lat_min_deg": 50, "lat_max_deg": 51, "lon_min_deg": 2,
                  "lon_max_deg": 4, "spacing_km": 80}],
        "policy": [{"name": "a3", "rule": "a3", "time_to_trigger_s": 1.024,
                    "ping_pong_window_s": 4.0}]}))
    sweep = tmp_path / "sweep.toml"
    sweep.write_text(tomli_w.dumps({"sweep": {"base": str(base), "name": "areas"},
                                    "axis": [{"key": KEY, "values": [0.0, 3.0]}]}))
    out = tmp_path / "out"
    import dwell.run
    monkeypatch.setattr(dwell.run, "TERMINAL_BATCH", 4)   # a task of several batches: parts
    res = CliRunner().invoke(main, ["sweep", str(sweep), "-o", str(out), "--workers", "1"])
    assert res.exit_code == 0, res.output
    df = combined_summary(out)
    listed = df["terminal"].astype(str) == "mill-field"
    assert df.loc[listed, "area"].isna().all() and (df.loc[listed, "weight"] == 1.0).all()
    for area, weight in (("vale", 3.0), ("moor", 1.0)):
        mine = df[df["area"] == area]
        assert len(mine) and mine["terminal"].astype(str).str.startswith(f"{area}-").all()
        assert (mine["weight"] == weight).all()
        means = area_means(df, area, [KEY])
        assert len(means) == 2                              # one per run (one policy)
        for _, row in means.iterrows():
            runs = mine[mine["run_key"] == row["run_key"]]
            w = runs["weight"].to_numpy(float)
            x = runs["handovers_per_hour"].to_numpy(float)
            assert row["handovers_per_hour"] == pytest.approx((w * x).sum() / w.sum(), rel=1e-12)
            ar = pd.read_parquet(out / "_runs" / row["run_key"] / "areas.parquet")
            ar = ar[ar["area"].astype(str) == area].iloc[0]
            for col in ("handovers_per_hour", "outage_fraction", "worst_hour_handovers",
                        "dwell_mean_s"):
                assert ar[f"{col}_mean"] == pytest.approx(row[col], rel=1e-12, nan_ok=True)
    names = [r.name for r in render_sweep(out, finish=lambda fig: b"")]
    assert "area_tradeoff_vale.png" in names and "area_tradeoff_moor.png" in names
    assert "tradeoff_mill-field.png" in names
    assert not any(n.startswith(("tradeoff_vale-", "tradeoff_moor-")) for n in names)
    # a run finished by an older dwell has no area columns: its rows take them by name
    first = sorted(out.glob("summary-*.parquet"))[0]
    old = pd.read_parquet(first).drop(columns=["area", "weight"])
    old.to_parquet(first)
    again = combined_summary(out)
    pd.testing.assert_series_equal(again["area"].astype(object), df["area"].astype(object))
    pd.testing.assert_series_equal(again["weight"], df["weight"])
    from dwell.sweep.report import report_sweep
    page = report_sweep(out).read_text()
    assert "area vale: weighted means over its" in page and "comparison-mill-field" in page
    assert "comparison-vale-001" not in page            # generated terminals: on request only
