"""Whole-kernel checks on small real scenarios: event kernel against the naive per-measurement
reference, pass accounting with one satellite in view at a time, run invariants, ping-pong
trend, determinism.

Scenarios: a 720-satellite Walker delta shell (550 km, 53 deg, 36 planes) for 1 h at a 1 s
(and 0.5 s) measurement period with log-normal shadowing and measurement noise, four terminals
(open sky; urban line-of-sight blockage, TR 38.811 LOS table; urban non-LOS loss, so the signal
goes weak; two mechanically steered apertures, make-before-break), and a single polar plane
seen from near the pole.  Sources are named beside each check; the kernels' execution model is
the module docstring of dwell.kernel.common (TS 38.331 section 5.3.10 for T310/N310/N311).
"""

from __future__ import annotations

import functools
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from dwell.analysis.records import handovers_frame
from dwell.io.config import Scenario, scenario_from_dict
from dwell.io.outputs import passes_frame
from dwell.kernel import RunResult, run_scenario
from dwell.orbits.geometry import Geometry
from dwell.run import build_tables

START = "2024-03-01T00:00:00Z"
SHELL = {"kind": "walker-delta", "satellites": 720, "planes": 36, "phasing": 1,
         "altitude_km": 550.0, "inclination_deg": 53.0}
NOISY = {"shadowing_std_db": 4.0, "measurement_noise_db": 2.0}
# Times are sums of a few float terms of up to ~7200 s; 1e-9 s is float rounding there only.
TOL_S = 1e-9

TERMINALS = {
    "open": {"lat_deg": 40.0, "lon_deg": -3.0, "min_elevation_deg": 25.0},
    # TR 38.811 urban LOS table, non-LOS satellites blocked: windows are cut, links are lost
    "blocked": {"lat_deg": 48.0, "lon_deg": 11.0, "min_elevation_deg": 20.0,
                "los": {"environment": "urban", "decorrelation_s": 5.0}},
    # non-LOS costs 20 dB: the serving satellite stays in view but drops below q_out
    "weak": {"lat_deg": 35.0, "lon_deg": 139.0, "min_elevation_deg": 20.0,
             "los": {"environment": "urban", "nlos_loss_db": 20.0}},
    "mbb": {"lat_deg": -33.0, "lon_deg": 151.0, "min_elevation_deg": 25.0, "apertures": 2,
            "steering": "mechanical", "slew_rate_deg_s": 5.0, "settle_s": 0.2},
}

POLICIES = {
    "a3-default": {"rule": "a3"},
    "a3-ttt0": {"rule": "a3", "time_to_trigger_s": 0.0, "hysteresis_db": 0.0, "offset_db": 0.0},
    "a3-ttt064": {"rule": "a3", "time_to_trigger_s": 0.64, "hysteresis_db": 2.0,
                  "offset_db": 1.0},
    "a3-guard": {"rule": "a3", "min_dwell_s": 20.0},
    "a3-guard-ttt0": {"rule": "a3", "min_dwell_s": 7.5, "time_to_trigger_s": 0.0},
    "a3-offsets": {"rule": "a3", "neighbour_offset_db": 1.0, "serving_offset_db": -0.5,
                   "time_to_trigger_s": 0.16},
    # a long time-to-trigger and a short T310, so radio link failure comes first
    "a3-rlf": {"rule": "a3", "time_to_trigger_s": 1.28, "t310_s": 0.5, "n311": 2,
               "reestablishment_s": 1.0},
    "a3-n310": {"rule": "a3", "time_to_trigger_s": 2.56, "n310": 2, "n311": 3, "t310_s": 0.0},
    "rsrp0": {"rule": "strongest-rsrp"},
    "rsrp3": {"rule": "strongest-rsrp", "hysteresis_db": 3.0, "min_dwell_s": 5.0},
    "elev0": {"rule": "highest-elevation"},
    "elev5": {"rule": "highest-elevation", "hysteresis_deg": 5.0},
    "range50": {"rule": "shortest-range", "hysteresis_km": 50.0},
    "ul-elev": {"rule": "until-lost"},
    "ul-rsrp": {"rule": "until-lost", "then": "rsrp"},
    "ul-range": {"rule": "until-lost", "then": "range"},
    "ul-vis": {"rule": "until-lost", "then": "visibility"},
    "longest": {"rule": "longest-visibility"},
    "cho-t1": {"rule": "cho", "condition": "t1"},
    "cho-d1": {"rule": "cho", "condition": "d1", "time_to_trigger_s": 0.64},
    "cho-a3": {"rule": "cho", "condition": "a3", "preparation_s": 10.0, "target": "rsrp"},
    "cho-t1a3": {"rule": "cho", "condition": "t1+a3", "t1_lead_s": 60.0, "t1_duration_s": 90.0},
    "cho-d1a3": {"rule": "cho", "condition": "d1+a3", "target": "visibility", "min_dwell_s": 10.0},
}

# multi-beam shells: earth-moving hex beams (S-band spot beams of TR 38.821 size: 2 m aperture,
# 30 dBi) and earth-fixed cells; the kernels must agree on cells too
BEAM = {"aperture_m": 2.0, "max_gain_dbi": 30.0, "reuse": 3}
HEX_SHELL = {**SHELL, "beams": {"layout": "hex", "rings": 9, "spacing_deg": 4.4, **BEAM}}
FIXED_SHELL = {**SHELL, "beams": {"layout": "hex", "cell_mode": "earth-fixed",
                                  "cell_spacing_km": 60.0, **BEAM}}
BEAM_LINK = {**NOISY, "eirp_density_dbw_mhz": 34.0, "shadowing_std_db": 2.0,
             "measurement_noise_db": 1.0}
BEAM_POLICIES = ["a3-default", "a3-ttt0", "a3-rlf", "rsrp3", "elev5", "ul-elev", "cho-d1a3",
                 "cho-t1"]

# configurations of the fast-vs-naive comparison: (period, terminals, policies[, constellation,
# link, duration])
CONFIGS = {
    "p1": (1.0, list(TERMINALS), list(POLICIES)),
    "p05": (0.5, ["open", "weak", "mbb"],
            ["a3-default", "a3-ttt0", "a3-guard", "a3-rlf", "rsrp3", "elev5", "ul-elev",
             "cho-t1", "cho-d1a3"]),
    "hex": (1.0, ["open", "mbb"], BEAM_POLICIES + ["elev0", "longest"], HEX_SHELL, BEAM_LINK,
            1800.0),
    "fixed": (1.0, ["open", "weak"], BEAM_POLICIES, FIXED_SHELL, BEAM_LINK, 1800.0),
}


def make_scenario(terminals: dict[str, dict], policies: dict[str, dict], *, period_s: float = 1.0,
                  duration_s: float = 3600.0, seed: int = 11, constellation: dict = SHELL,
                  link: dict = NOISY) -> Scenario:
    raw = {"scenario": {"start": START, "duration_s": duration_s, "seed": seed,
                        "measurement_period_s": period_s},
           "constellation": [constellation],
           "terminal": [{"name": n, **t} for n, t in terminals.items()],
           "link": link,
           "policy": [{"name": n, **p} for n, p in policies.items()]}
    return scenario_from_dict(raw, "test.toml", Path("."))


@functools.lru_cache(maxsize=None)
def config(name: str) -> tuple[Scenario, Geometry]:
    period, terms, pols, *rest = CONFIGS[name]
    extra = dict(zip(("constellation", "link", "duration_s"), rest))
    scen = make_scenario({t: TERMINALS[t] for t in terms}, {p: POLICIES[p] for p in pols},
                         period_s=period, **extra)
    return scen, Geometry(scen)


@functools.lru_cache(maxsize=None)
def run_one(name: str, terminal: str, policy: str, kernel: str) -> RunResult:
    scen, geo = config(name)
    k = scen.terminal_names().index(terminal)
    table = next(p for p in scen.policies if p["name"] == policy)
    results, _ = run_scenario(scen, kernel=kernel, geometry=geo, terminals=[k],
                              policy_tables=[table])
    return results[0]


def _cases():
    for name, (_, terms, pols, *_) in CONFIGS.items():
        for t in terms:
            for p in pols:
                yield pytest.param(name, t, p, id=f"{name}-{t}-{p}")


# ---- the event kernel against the naive reference ------------------------------------------------

@pytest.mark.parametrize("name, terminal, policy", list(_cases()))
def test_fast_kernel_equals_naive(name, terminal, policy):
    # Benchmark issue's correctness requirement: "the fast kernel gives exactly the same
    # handovers on small scenarios" -- every handover (time, from, to, trigger) and every link.
    fast = run_one(name, terminal, policy, "fast").records
    naive = run_one(name, terminal, policy, "naive").records
    assert fast.signature() == naive.signature()
    assert fast.failures == pytest.approx(naive.failures, abs=TOL_S)


@pytest.mark.parametrize("name, terminal, policy", [("p1", "blocked", "a3-rlf"),
                                                    ("p1", "blocked", "cho-d1"),
                                                    ("p1", "weak", "a3-n310"),
                                                    ("p1", "weak", "ul-elev"),
                                                    ("p05", "weak", "ul-elev")])
def test_rlf_settings_fire(name, terminal, policy):
    # Premise of the comparison above: these runs really exercise radio link failure
    # (TS 38.331 5.3.10: T310 started by N310 out-of-sync indications, failure on expiry).
    assert len(run_one(name, terminal, policy, "fast").records.failures) > 0


def test_make_before_break_uses_both_apertures():
    # Premise: with two apertures every handover is make-before-break on the other aperture
    # (dwell.hardware docstring), so consecutive links alternate apertures.
    links = run_one("p1", "mbb", "a3-default", "fast").records.links
    ap = np.array([l[1] for l in links])
    assert set(ap.tolist()) == {0, 1}
    # a link a satellite change opens is on the other aperture (a re-establishment after a
    # failure keeps the one it has)
    by_change = np.array([l[4] == "handover" and l[0] != p[0] for p, l in zip(links, links[1:])])
    assert by_change.sum() > 10
    assert np.all(ap[1:][by_change] != ap[:-1][by_change])


def test_naive_kernel_survives_a_loss_before_the_first_row():
    # Regression: 60 s, highest elevation under urban blockage.
    # Handover at 25 s to satellite 243, whose (blockage-cut) window ends at 25.5 s; the link
    # starts at 25.051 s (0.051 s break), its first measurement is at 26 s, and the naive
    # kernel dates the loss 25.5 s while simpy's clock is at 26 s.  The execution model
    # (kernel.common) asks for a loss handover at 25.5 s, as the event kernel makes.
    scen = make_scenario({"blocked": TERMINALS["blocked"]}, {"elev0": POLICIES["elev0"]},
                         duration_s=60.0, link={})
    fast, geo = run_scenario(scen, kernel="fast")
    naive, _ = run_scenario(scen, kernel="naive", geometry=geo)
    assert fast[0].records.signature() == naive[0].records.signature()


def test_fast_equals_naive_with_release_on_a_row_instant():
    # 0.1 s period, no handover break: links start on measurement instants k * 0.1 and the
    # 10 s guard releases at k * 0.1 + 10, which in floats is often an ulp below the row
    # (k + 100) * 0.1.  Benchmark issue requirement as above: identical handovers.
    term = {"t": {**TERMINALS["open"], "interruption_s": 0.0, "retune_s": 0.0}}
    pol = {"a3g": {"rule": "a3", "min_dwell_s": 10.0, "offset_db": 0.0, "hysteresis_db": 0.0,
                   "time_to_trigger_s": 0.0}}
    scen = make_scenario(term, pol, period_s=0.1, duration_s=1800.0, seed=3)
    fast, geo = run_scenario(scen, kernel="fast")
    naive, _ = run_scenario(scen, kernel="naive", geometry=geo)
    assert fast[0].records.signature() == naive[0].records.signature()


# ---- one satellite in view at a time -------------------------------------------------------------

def polar_plane(n_sat: int, kernel: str):
    """n_sat satellites evenly spaced in one polar plane, seen from 89.5 deg N for 2 h: every
    satellite passes near the zenith once an orbit, one after another."""
    plane = {"kind": "walker-delta", "satellites": n_sat, "planes": 1, "altitude_km": 550.0,
             "inclination_deg": 90.0}
    scen = make_scenario({"pole": {"lat_deg": 89.5, "lon_deg": 0.0, "min_elevation_deg": 25.0}},
                         {"until-lost": {"rule": "until-lost", "procedure": "instant"}},
                         duration_s=7200.0,
                         constellation=plane)
    results, geo = run_scenario(scen, kernel=kernel)
    return scen, geo, results[0]


def expected_until_lost(passes: pd.DataFrame, sat_of: dict[str, int], duration_s: float,
                        period_s: float, t310_s: float, reestablishment_s: float,
                        break_s: float, t311_s: float = 3.0) -> list[tuple]:
    """Links an until-lost terminal must have, from the passes table alone (execution model of
    dwell.kernel.common with N310 = 1): a pass that rises before the serving one sets is reached
    by a handover at the set instant (the new link starts after the break); otherwise the link
    fails T310 after the first out-of-sync indication, and the next pass is reached by
    re-establishment at its first measurement instant plus the re-establishment time.

    TS 38.133 section 8.1 (values from memory): indications every 20 ms (max(10 ms, the 20 ms
    SSB period)), out-of-sync judged on the mean quality of the last 200 ms.  The serving SNR
    before a set is far above Q_out + 10 dB, so the window's mean stays above Q_out until the
    whole window lies after the set: the first out-of-sync indication is the first multiple of
    20 ms whose window's oldest sample (180 ms earlier) is at or after the set."""
    p = passes.sort_values("rise_s")
    sat = [sat_of[s] for s in p["satellite"]]
    rise = p["rise_s"].to_numpy()
    fall = p["set_s"].to_numpy()

    def first_row(t: float) -> float:    # first measurement instant at or after t
        return math.ceil(t / period_s) * period_s

    out = []
    start, reason = first_row(rise[0]), "initial"
    for i in range(len(sat)):
        last = i == len(sat) - 1
        if not last and rise[i + 1] <= fall[i]:
            # premise: exactly one other satellite in view then, already measured at the row
            # before the set instant
            assert i + 2 >= len(sat) or rise[i + 2] > fall[i]
            assert rise[i + 1] <= math.floor(fall[i] / period_s) * period_s
            out.append((sat[i], start, fall[i], reason, "handover"))
            start, reason = fall[i] + break_s, "handover"
            continue
        t_fail = math.ceil((fall[i] + 0.18) / 0.02 - 1e-9) * 0.02 + t310_s
        if t_fail >= duration_s:
            out.append((sat[i], start, duration_s, reason, "end"))
            break
        out.append((sat[i], start, t_fail, reason, "failure"))
        if last:
            break
        assert rise[i + 1] > t_fail          # premise: the failure precedes the next pass
        # TS 38.331 5.3.7: re-establishment while T311 runs, else idle and a new connection
        reached = first_row(rise[i + 1])
        start = reached + reestablishment_s
        reason = "reestablishment" if reached < t_fail + t311_s else "setup"
    return out


@pytest.mark.parametrize("n_sat, kernel", [(8, "fast"), (24, "fast"), (8, "naive"),
                                           (24, "naive")])
def test_until_lost_reaches_every_pass(n_sat, kernel):
    # With at most one other satellite in view, "until-lost" moves on exactly once per pass, so
    # handovers + re-establishments = passes - 1, and the links follow from the passes table.
    # 8 satellites (45 deg apart): passes never overlap, every pass is reached by
    # re-establishment; 24 (15 deg apart): consecutive passes overlap by ~35 s, every pass is
    # reached by a handover at the set of the previous one.
    scen, geo, res = polar_plane(n_sat, kernel)
    passes = passes_frame(geo)
    sat_of = {n: i for i, n in enumerate(scen.constellation.names)}
    pol = scen.policies[0]
    term = scen.terminals[0]
    assert pol["n310"] == 1              # premise of expected_until_lost
    want = expected_until_lost(passes, sat_of, 7200.0, 1.0, pol["t310_s"],
                               pol["reestablishment_s"],
                               term["interruption_s"] + term["retune_s"], pol["t311_s"])
    got = res.records.links
    assert [l[0] for l in got] == [w[0] for w in want]
    assert [(l[4], l[5]) for l in got] == [(w[3], w[4]) for w in want]
    np.testing.assert_allclose([l[2] for l in got], [w[1] for w in want], rtol=0, atol=TOL_S)
    np.testing.assert_allclose([l[3] for l in got], [w[2] for w in want], rtol=0, atol=TOL_S)
    moves = len(res.records.handovers) + sum(l[4] in ("reestablishment", "setup") for l in got)
    assert moves == len(passes) - 1
    # handovers per hour = rate of passes reached while connected: all but the first when
    # passes overlap, none when they do not
    hours = 7200.0 / 3600.0
    reached_connected = len(passes) - 1 if n_sat == 24 else 0
    assert len(res.records.handovers) / hours == reached_connected / hours


@pytest.mark.parametrize("n_sat", [8, 24])
def test_until_lost_time_adds_up(n_sat):
    # Accounting identity (dwell.analysis.records docstring): dwell in view + every outage and
    # switching interval = scenario time, exactly.  Dwell in view is computed here from the
    # links and the passes table; the outage rows come from the run's tables.
    scen, geo, res = polar_plane(n_sat, "fast")
    tables = build_tables(scen, [res], geo)
    passes = passes_frame(geo)
    sat_of = {n: i for i, n in enumerate(scen.constellation.names)}
    ps = np.array([sat_of[s] for s in passes["satellite"]])
    in_view = 0.0
    for sat, _, a, b, *_ in res.records.links:
        m = ps == sat
        lo = np.maximum(passes["rise_s"].to_numpy()[m], a)
        hi = np.minimum(passes["set_s"].to_numpy()[m], b)
        in_view += float(np.clip(hi - lo, 0.0, None).sum())
    outage = float(tables.frames["outages"]["duration_s"].sum())
    assert not res.records.weak          # premise: the zenith passes are never below q_out
    # tolerance: float rounding of sums of ~30 terms of up to 7200 s
    assert in_view + outage == pytest.approx(7200.0, abs=1e-6)
    if n_sat == 24:                      # links end at set instants: dwell is all in view
        dwell = float(tables.frames["links"]["dwell_s"].sum())
        assert dwell == pytest.approx(in_view, abs=1e-6)


# ---- invariants ----------------------------------------------------------------------------------

INVARIANT_RUNS = [("p1", "open", "a3-default"), ("p1", "blocked", "a3-rlf"),
                  ("p1", "blocked", "ul-rsrp"), ("p1", "weak", "elev0"),
                  ("p1", "weak", "cho-t1"), ("p1", "mbb", "rsrp3"), ("p1", "mbb", "cho-d1"),
                  ("p05", "weak", "a3-guard"), ("p05", "mbb", "ul-elev")]


def _breakdown(res: RunResult, windows: pd.DataFrame, duration_s: float) -> dict[str, float]:
    """Serving / switching time of one run, computed independently of dwell.analysis: cut the
    scenario at every edge of links, windows, weak-signal and switching intervals and classify
    each piece by its midpoint."""
    rec = res.records
    links = np.array([(l[0], l[2], l[3]) for l in rec.links]).reshape(-1, 3)
    weak = np.array(rec.weak).reshape(-1, 2)
    sw = np.array(rec.switching).reshape(-1, 2)
    cuts = np.unique(np.concatenate([[0.0, duration_s], links[:, 1:].ravel(), weak.ravel(),
                                     sw.ravel(), windows["start_s"].to_numpy(),
                                     windows["end_s"].to_numpy()]))
    cuts = cuts[(cuts >= 0.0) & (cuts <= duration_s)]
    mid = 0.5 * (cuts[:-1] + cuts[1:])
    length = np.diff(cuts)

    def covered(a, b, t):
        return ((a[None, :] <= t[:, None]) & (t[:, None] < b[None, :])).any(axis=1)

    serving = np.zeros(mid.size, bool)
    for sat in np.unique(links[:, 0]):
        mine = links[links[:, 0] == sat]
        w = windows[windows["sat"] == int(sat)]
        serving |= covered(mine[:, 1], mine[:, 2], mid) & \
            covered(w["start_s"].to_numpy(), w["end_s"].to_numpy(), mid)
    serving &= ~covered(weak[:, 0], weak[:, 1], mid)
    switching = covered(sw[:, 0], sw[:, 1], mid) & ~serving
    return {"serving_s": float(length[serving].sum()),
            "switching_s": float(length[switching].sum())}


@pytest.mark.parametrize("name, terminal, policy", INVARIANT_RUNS,
                         ids=["-".join(c) for c in INVARIANT_RUNS])
def test_invariants(name, terminal, policy):
    scen, geo = config(name)
    res = run_one(name, terminal, policy, "fast")
    # dwell.run.check_invariants (raises InvariantError) on the run's own tables
    tables = build_tables(scen, [res], geo, check=True)
    row = tables.frames["summary"].iloc[0]
    T = float(scen.scenario["duration_s"])
    windows = geo.window_frame(res.site_index)
    rec = res.records
    # links of one aperture never overlap (one aperture points at one satellite; common practice)
    for ap in {l[1] for l in rec.links}:
        iv = sorted((l[2], l[3]) for l in rec.links if l[1] == ap)
        assert all(b0 <= a1 + TOL_S for (_, b0), (a1, _) in zip(iv, iv[1:]))
    # a handover goes to a satellite in view at its instant (execution model, kernel.common);
    # failed attempts (too late, T304 expiry) are records too but serve nobody
    done = [h for h in rec.handovers if h[23] == "success"]
    for h in done:
        w = windows[windows["sat"] == h[2]]
        assert ((w["start_s"] <= h[0]) & (h[0] < w["end_s"])).any(), h
    # serving + switching + outage = scenario time, with serving and switching recomputed here
    # (tolerance: float rounding of sums of a few thousand interval lengths of up to 3600 s)
    mine = _breakdown(res, windows, T)
    assert mine["serving_s"] == pytest.approx(row["serving_s"], abs=1e-6)
    assert mine["switching_s"] == pytest.approx(row["switching_s"], abs=1e-6)
    assert row["serving_s"] + row["switching_s"] + row["outage_s"] == pytest.approx(T, abs=1e-6)
    # summary counts equal the records
    assert row["handovers"] == len(done)
    assert row["handover_attempts"] == len(rec.handovers)
    assert row["links"] == len(rec.links)
    assert row["radio_link_failures"] == len(rec.failures)


# ---- ping-pong trend -----------------------------------------------------------------------------

def _ping_pongs(param: str, values: list[float]) -> list[int]:
    base = {"rule": "a3", "offset_db": 0.0, "hysteresis_db": 0.0, "time_to_trigger_s": 0.0,
            "ping_pong_window_s": 5.0}
    pols = {f"{param}={v}": {**base, param: v} for v in values}
    scen = make_scenario({"open": TERMINALS["open"]}, pols, seed=5)
    results, _ = run_scenario(scen, kernel="fast")
    names = scen.constellation.names
    return [int(handovers_frame(r, names)["ping_pong"].sum()) for r in results]


@pytest.mark.parametrize("param, values", [("hysteresis_db", [0.0, 1.0, 2.0, 4.0]),
                                           ("time_to_trigger_s", [0.0, 1.28, 2.56, 5.12])])
def test_more_hysteresis_or_ttt_never_more_ping_pong(param, values):
    # Common practice (serving-policy issue): raising A3 hysteresis or time-to-trigger does not
    # raise ping-pong.  Fixed seed, noisy link.  The ping-pong window is widened from the 1 s of
    # TR 36.839 (from memory) to 5 s so the long time-to-triggers still leave counts to compare;
    # TTT values are chosen to need 1, 2, 3 and 6 measurements at the 1 s period.
    counts = _ping_pongs(param, values)
    assert counts[0] > 0                                  # premise: there is ping-pong to reduce
    assert all(b <= a for a, b in zip(counts, counts[1:])), counts


# ---- determinism ---------------------------------------------------------------------------------

DET_POLICIES = {p: POLICIES[p] for p in ("a3-default", "rsrp3", "elev5", "cho-d1a3")}


def _signatures(seed: int) -> dict[str, list]:
    scen = make_scenario({"open": TERMINALS["open"]}, DET_POLICIES, seed=seed)
    results, _ = run_scenario(scen, kernel="fast")
    return {r.policy: r.records.signature() for r in results}


def test_same_seed_same_run_other_seed_other_noise():
    # Counter-based noise (dwell.noise): a run is a pure function of scenario and seed.
    first, again, other = _signatures(11), _signatures(11), _signatures(12)
    assert first == again
    # the seed drives shadowing and measurement noise, so RSRP-driven policies change ...
    assert first["a3-default"] != other["a3-default"]
    assert first["rsrp3"] != other["rsrp3"]
    # ... and a purely geometric one does not (no random part touches it without LOS)
    assert first["elev5"] == other["elev5"]
