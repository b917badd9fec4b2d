"""Network load tables (load, load_peaks, load_bursts): handovers per second into and out of
each satellite and cell, weighted by the population.

Checks:

- a hand-made set of handovers against the definitions in dwell/analysis/load.py worked out
  by hand (who enters and leaves which satellite and cell in which second);
- on a run with earth-fixed cells over a small area (a population sharing cells): the load of
  every satellite and cell integrates to the population's weighted handover total (each
  handover leaves one satellite or cell and enters one: accounting), the peaks and bursts are
  those of the per-second rows, and the scheduled cell switches - every terminal of a cell
  handed to the next satellite at once - show as bursts of many terminals.

Cost: one 20-minute run of about 20 terminals under a 720-satellite shell with 127 earth-fixed
beams; about 10 s.
"""

from __future__ import annotations

import copy

import numpy as np
import pandas as pd
import pytest
import tomli_w
from click.testing import CliRunner

from dwell.analysis.load import load_tables
from dwell.cli import main


def _hos(rows):
    cols = ["terminal", "policy", "time_utc", "from_satellite", "to_satellite", "from_cell",
            "to_cell", "scope"]
    return pd.DataFrame(rows, columns=cols)


def test_hand_made_handovers():
    # three terminals of weights 1, 2 and 5 leave satellite A for B within second 10 (a group
    # handover); one of them changes beam on B at 12.5 s; under a second policy one terminal
    # hands over at 10.99 s (still second 10)
    hos = _hos([
        ("t1", "p", 10.0, "A", "B", "A/b0", "B/b3", "inter-satellite"),
        ("t2", "p", 10.4, "A", "B", "A/b0", "B/b3", "inter-satellite"),
        ("t3", "p", 10.9, "A", "B", "A/b1", "B/b4", "inter-satellite"),
        ("t3", "p", 12.5, "B", "B", "B/b4", "B/b3", "intra-satellite"),
        ("t1", "q", 10.99, "A", "C", "A/b0", "C/b0", "inter-satellite"),
    ])
    t = load_tables(hos, {"t1": 1.0, "t2": 2.0, "t3": 5.0}, ["p", "q"], duration_s=100.0)
    load = t["load"].set_index(["policy", "level", "element", "second"])
    # satellite B: all three enter it in second 10 (weight 1 + 2 + 5), t3's beam change in 12
    assert load.loc[("p", "satellite", "B", 10), ["into", "into_terminals"]].tolist() == [8, 3]
    assert load.loc[("p", "satellite", "A", 10), ["out_of", "out_of_terminals"]].tolist() == [8, 3]
    assert load.loc[("p", "satellite", "B", 12), ["within", "within_terminals"]].tolist() == [5, 1]
    # cells: B/b3 gets t1, t2 in second 10 and t3 in second 12; A/b0 loses t1 and t2
    assert load.loc[("p", "cell", "B/b3", 10), "into"] == 3
    assert load.loc[("p", "cell", "B/b3", 12), "into"] == 5
    assert load.loc[("p", "cell", "B/b4", 12), "out_of"] == 5
    assert load.loc[("p", "cell", "A/b0", 10), ["out_of", "out_of_terminals"]].tolist() == [3, 2]
    assert load.loc[("q", "satellite", "C", 10), "into"] == 1
    # one row per element and busy second: under p, satellites A (10), B (10, 12) and cells
    # A/b0, A/b1 (10), B/b3, B/b4 (10, 12); under q, satellites A, C and cells A/b0, C/b0 (10)
    assert len(t["load"]) == 3 + 6 + 4
    peaks = t["load_peaks"].set_index(["policy", "level", "element"])
    # B under p: 8 in second 10, 5 in second 12
    b = peaks.loc[("p", "satellite", "B")]
    assert (b["peak_per_s"], b["handovers_into"], b["handovers_within"], b["busy_seconds"],
            b["largest_burst_terminals"]) == (8, 8, 5, 2, 3)
    assert b["mean_per_s"] == pytest.approx(13 / 100.0)
    bursts = t["load_bursts"]
    into_sat = bursts[(bursts["policy"] == "p") & (bursts["level"] == "satellite")
                      & (bursts["direction"] == "into")]
    assert into_sat[["burst_terminals", "bursts", "handovers", "weight"]].values.tolist() == [
        [3, 1, 3, 8.0]]


@pytest.fixture(scope="module")
def fixed_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("load")
    raw = {
        "scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 1200},
        "constellation": [{"kind": "walker-delta", "name": "lark", "satellites": 720,
                           "planes": 36, "phasing": 1, "altitude_km": 600,
                           "inclination_deg": 55,
                           "beams": {"layout": "hex", "rings": 6, "reuse": 3,
                                     "cell_mode": "earth-fixed", "cell_spacing_km": 40}}],
        "link": {"preset": "s-band-leo600-handheld"},
        "terminal": [{"name": "depot", "lat_deg": 45.2, "lon_deg": 9.3}],
        "area": [{"name": "town", "lat_min_deg": 45.0, "lat_max_deg": 45.3,
                  "lon_min_deg": 9.0, "lon_max_deg": 9.4, "spacing_km": 8,
                  "density_per_km2": 150.0}],
        "policy": [{"name": "a3", "rule": "a3", "time_to_trigger_s": 0.32},
                   {"name": "he", "rule": "highest-elevation", "hysteresis_deg": 3}],
    }
    cfg = folder / "fixed.toml"
    cfg.write_text(tomli_w.dumps(raw))
    out = folder / "out"
    result = CliRunner().invoke(main, ["run", str(cfg), "-o", str(out), "--workers", "1"])
    assert result.exit_code == 0, (result.output, result.exception)
    tables = {t: pd.read_parquet(out / f"{t}.parquet")
              for t in ("handovers", "map", "load", "load_peaks", "load_bursts")}
    return copy.deepcopy(raw), tables


def _weights(tables) -> pd.Series:
    w = tables["map"].drop_duplicates("terminal").set_index("terminal")["weight"]
    return pd.concat([w, pd.Series({"depot": 1.0})])       # listed terminals weigh 1


def test_load_integrates_to_the_weighted_total(fixed_run):
    _, tables = fixed_run
    hos, load = tables["handovers"], tables["load"]
    w = hos["terminal"].astype(str).map(_weights(tables)).to_numpy()
    inter = (hos["scope"] == "inter-satellite").to_numpy()
    pol = hos["policy"].astype(str).to_numpy()
    assert inter.sum() > 20 and (~inter).sum() > 5
    for p in ("a3", "he"):
        mine = pol == p
        sat = load[(load["policy"].astype(str) == p) & (load["level"] == "satellite")]
        cell = load[(load["policy"].astype(str) == p) & (load["level"] == "cell")]
        # accounting: every satellite change leaves one satellite and enters another; every
        # change of cell (beam or scheduled switch) leaves one cell and enters one
        # (1e-9 relative: sums of ~1e3 weights of ~1e4 in another order)
        assert sat["into"].sum() == pytest.approx(w[mine & inter].sum(), rel=1e-9)
        assert sat["out_of"].sum() == pytest.approx(w[mine & inter].sum(), rel=1e-9)
        assert sat["within"].sum() == pytest.approx(w[mine & ~inter].sum(), rel=1e-9)
        assert cell["into"].sum() == pytest.approx(w[mine].sum(), rel=1e-9)
        assert cell["out_of"].sum() == pytest.approx(w[mine].sum(), rel=1e-9)
        assert sat["into_terminals"].sum() == (mine & inter).sum()
        assert cell["into_terminals"].sum() == mine.sum()


def test_peaks_and_bursts_are_those_of_the_seconds(fixed_run):
    _, tables = fixed_run
    load, peaks, bursts = tables["load"], tables["load_peaks"], tables["load_bursts"]
    key = ["policy", "level", "element"]
    g = load.assign(policy=load["policy"].astype(str)).groupby(key, sort=False)
    want = pd.DataFrame({"peak_per_s": g["total"].max(), "handovers_into": g["into"].sum(),
                         "busy_seconds": g.size()})
    got = peaks.assign(policy=peaks["policy"].astype(str)).set_index(key)
    pd.testing.assert_frame_equal(got[want.columns].sort_index(), want.sort_index(),
                                  check_dtype=False)
    for (p, level), b in bursts.groupby(["policy", "level"]):
        rows = load[(load["policy"].astype(str) == p) & (load["level"] == level)]
        for d in ("into", "out_of", "within"):
            k = rows[f"{d}_terminals"].to_numpy()
            bd = b[b["direction"] == d]
            assert bd["handovers"].sum() == k.sum()
            assert bd["bursts"].sum() == (k > 0).sum()
            assert bd["weight"].sum() == pytest.approx(rows[d].sum(), rel=1e-9)


def test_cell_switches_show_as_bursts(fixed_run):
    # an earth-fixed cell handed to the next satellite takes every terminal in it along at the
    # scheduled instant (the network's schedule): one burst of as many terminals as the
    # switch moved, into and out of that ground cell in that second
    _, tables = fixed_run
    hos, load = tables["handovers"], tables["load"]
    sw = hos[hos["trigger"] == "cell-switch"].copy()
    assert len(sw) > 0
    sw["second"] = np.floor((sw["time_utc"] - pd.Timestamp("2027-05-10T00:00:00Z"))
                            .dt.total_seconds()).astype(int)
    groups = sw.groupby([sw["policy"].astype(str), "to_cell", "second"]).size()
    assert groups.max() >= 5               # a group handover: five or more terminals at once
    cells = load[load["level"] == "cell"].assign(policy=load["policy"].astype(str))
    cells = cells.set_index(["policy", "element", "second"])
    for (p, c, s), n in groups.items():
        row = cells.loc[(p, c, s)]
        assert row["into_terminals"] >= n and row["out_of_terminals"] >= n
    biggest = tables["load_bursts"]
    biggest = biggest[(biggest["level"] == "cell") & (biggest["direction"] == "into")]
    assert biggest["burst_terminals"].max() >= groups.max()


def test_load_plot_bins_keep_the_busiest_second_and_the_mean():
    # load.png bins a long run's seconds: each bin must show its largest per-second value and
    # its mean per second (seconds without a handover count 0; the last bin may be shorter).
    # Reference: pandas' groupby max and sum over the same bins, computed independently.
    from dwell.analysis.maps import _bin_s, _binned
    assert _bin_s(1800) == 1 and _bin_s(43200) == 60 and _bin_s(86400 * 7) == 60 * 7
    rng = np.random.default_rng(5)
    duration_s, bin_s = 7230.0, 60
    second = np.sort(rng.choice(int(duration_s), 900, replace=False)).astype(float)
    value = rng.integers(1, 9, second.size).astype(float)
    edges, peak, mean = _binned(second, value, duration_s, bin_s)
    assert edges[0] == 0 and edges[-1] == duration_s and len(peak) == len(edges) - 1 == 121
    g = pd.Series(value).groupby(second // bin_s)
    expect_peak = np.zeros(121)
    expect_peak[g.max().index.astype(int)] = g.max().to_numpy()
    expect_sum = np.zeros(121)
    expect_sum[g.sum().index.astype(int)] = g.sum().to_numpy()
    widths = np.r_[np.full(120, 60.0), 30.0]
    np.testing.assert_array_equal(peak, expect_peak)
    np.testing.assert_allclose(mean, expect_sum / widths, rtol=1e-12)   # float summation order
