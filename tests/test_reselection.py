"""Idle-mode reselection (``rule = "reselection"``) against TS 38.304: the S-criterion
(5.2.3.2), when neighbours are measured (5.2.4.2 with the Rel-17 NTN distanceThresh and
t-Service), the R-criterion with Qhyst, Qoffset and Treselection and the 1 s camped rule
(5.2.4.6); hand-worked traces on rows built here, both kernels, and the issue's monotonicity
check.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from dwell.io.config import scenario_from_dict
from dwell.kernel import run_scenario
from dwell.policies.base import Link, Rows, COMMON_KEYS
from dwell.policies.reselection import Reselection

DT = 0.5


def _params(**kw):
    p = {k: f.default for k, f in {**COMMON_KEYS, **Reselection.KEYS}.items()}
    p.update(name="idle", rule="reselection", **kw)
    return p


def _rows(serving_dbm, neighbour_dbm, ref_km=None, end_s=1000.0):
    """Two cells of two satellites, measured every DT from t = 0: serving (sat 0) and a
    neighbour (sat 1) with the RSRP series given."""
    s = np.asarray(serving_dbm, float)
    n = np.asarray(neighbour_dbm, float)
    k = s.size
    two = lambda a, b: np.stack([a, b], axis=1)      # noqa: E731
    full = lambda v: np.full((k, 2), v, float)       # noqa: E731
    ref = two(np.asarray(ref_km, float) if ref_km is not None else np.zeros(k), np.zeros(k))
    return Rows(0, np.arange(k) * DT, np.tile([0, 1], (k, 1)), np.tile([10, 11], (k, 1)),
                two(s, n), full(20.0), full(45.0), full(0.0), full(900.0), full(300.0),
                full(0.0), full(end_s), ref_km=ref)


def _both(policy, rows, link_kw=None):
    """The vectorised scan and the row-by-row step must agree; returns the decision."""
    kw = {"start_s": 0.0, "release_s": 0.0, **(link_kw or {})}
    d1 = policy.scan(rows, Link(0, **kw))
    link = Link(0, **kw)
    policy.start(link)
    d2 = None
    for r in range(rows.n):
        d2 = policy.step(rows, r, link)
        if d2 is not None:
            break
    assert (d1 is None) == (d2 is None)
    if d1 is not None:
        assert (d1.time_s, d1.target, d1.trigger) == (d2.time_s, d2.target, d2.trigger)
    return d1


def test_r_criterion_with_hysteresis_and_treselection():
    # TS 38.304 5.2.4.6: Rs = Qmeas,s + Qhyst, Rn = Qmeas,n - Qoffset; reselect when Rn > Rs
    # during Treselection.  Serving -100 dBm, Qhyst 4, Qoffset 1: the neighbour must exceed
    # -95 dBm.  It ramps 0.5 dB per row from -110 dBm: -94.5 dBm first at row 31 (t = 15.5 s);
    # held over Treselection = 2 s (rows 31..35), the reselection is at 15.5 + 2 = 17.5 s.
    pol = Reselection(_params(q_hyst_db=4.0, q_offset_db=1.0, t_reselection_s=2.0), DT)
    k = 80
    rows = _rows(np.full(k, -100.0), -110.0 + 0.5 * np.arange(k))
    d = _both(pol, rows)
    assert d is not None and d.trigger == "reselection" and d.target == 1
    assert d.time_s == pytest.approx(15.5 + 2.0)


def test_a_broken_run_restarts_treselection():
    # 5.2.4.6 "during a time interval Treselection": a neighbour that drops below for one
    # measurement starts its interval again.  Above from row 10, below at row 13, above again
    # from row 14: with Treselection = 2 s the reselection is at 14 * 0.5 + 2 = 9 s.
    pol = Reselection(_params(q_hyst_db=2.0, t_reselection_s=2.0), DT)
    n = np.full(60, -105.0)
    n[10:] = -95.0
    n[13] = -105.0
    d = _both(pol, _rows(np.full(60, -100.0), n))
    assert d.time_s == pytest.approx(9.0)


def test_one_second_camped_rule():
    # 5.2.4.6: reselect only when more than 1 s has passed since camping on the serving cell.
    # A neighbour far above from the first row with Treselection 0 waits for t = 1 s (link
    # start 0) -- and with a link started at 0.2 s, for 1.2 s (the first row at or after: 1.5).
    pol = Reselection(_params(q_hyst_db=0.0, t_reselection_s=0.0), DT)
    rows = _rows(np.full(20, -100.0), np.full(20, -80.0))
    assert _both(pol, rows).time_s == pytest.approx(1.0)
    assert _both(pol, rows, {"start_s": 0.2}).time_s == pytest.approx(1.5)


def test_s_criterion_and_cell_selection():
    # 5.2.3.2: a cell is suitable when Srxlev = Qrxlevmeas - Qrxlevmin > 0.  A neighbour
    # ranked above but below Qrxlevmin is never taken; when the camped cell itself fails the
    # S-criterion the terminal selects the strongest suitable cell at once ("selection").
    pol = Reselection(_params(q_rxlevmin_dbm=-90.0, q_hyst_db=0.0, t_reselection_s=0.0), DT)
    assert _both(pol, _rows(np.full(20, -80.0), np.full(20, -70.0))).time_s == pytest.approx(1.0)
    assert _both(pol, _rows(np.full(20, -89.0), np.full(20, -91.0))) is None
    s = np.full(20, -85.0)
    s[6:] = -95.0                           # unsuitable from row 6 (t = 3 s)
    n = np.full(20, -120.0)
    n[6:] = -88.0                           # only then is the neighbour suitable
    d = _both(pol, _rows(s, n))
    assert (d.time_s, d.trigger) == (3.0, "selection")


def test_when_neighbours_are_measured():
    # 5.2.4.2: with Srxlev > SIntraSearchP the terminal may skip neighbours (we skip them);
    # Rel-17 NTN: it measures anyway when farther than distanceThresh from the serving cell's
    # reference location, and before t-Service (the serving cell's stop time).
    base = dict(q_rxlevmin_dbm=-120.0, q_hyst_db=0.0, t_reselection_s=0.0,
                s_intrasearch_p_db=10.0)
    serving = np.full(40, -100.0)             # Srxlev 20 dB > 10: neighbours not measured
    neighbour = np.full(40, -90.0)
    assert _both(Reselection(_params(**base), DT), _rows(serving, neighbour)) is None
    # distance: the reference location recedes 10 km per row; beyond 150 km from row 16
    ref = 10.0 * np.arange(40)
    pol = Reselection(_params(**base, distance_thresh_km=150.0), DT)
    assert _both(pol, _rows(serving, neighbour, ref_km=ref)).time_s == pytest.approx(8.0)
    # t-Service: serving cell stops at 15 s, measured from 10 s before (t_service_lead_s)
    pol = Reselection(_params(**base, t_service_lead_s=10.0), DT)
    d = _both(pol, _rows(serving, neighbour), {"serving_end_s": 15.0})
    assert d.time_s == pytest.approx(5.0)


# ---- whole runs --------------------------------------------------------------------------

SHELL = {"kind": "walker-delta", "name": "tern", "satellites": 720, "planes": 36, "phasing": 1,
         "altitude_km": 600.0, "inclination_deg": 55.0}
HEX = {**SHELL, "beams": {"layout": "hex", "rings": 2, "reuse": 3}}
NOISY = {"measurement_noise_db": 1.0, "shadowing_std_db": 2.0, "shadowing_decorrelation_s": 8}


def _scenario(policies, constellation=SHELL, link=NOISY, duration_s=3600.0, **terminal_keys):
    raw = {"scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": duration_s, "seed": 3,
                        "measurement_period_s": DT},
           "constellation": [constellation],
           "terminal": [{"name": "plain", "lat_deg": 44.0, "lon_deg": 9.0,
                         "min_elevation_deg": 25.0, **terminal_keys}],
           "link": link, "policy": policies}
    return scenario_from_dict(raw, "t.toml", Path("."))


@pytest.mark.parametrize("constellation, link", [(SHELL, NOISY),
                                                 (HEX, {**NOISY, "preset": "s-band-leo600-handheld"})],
                         ids=["single", "hex"])
def test_kernels_agree(constellation, link):
    # the event kernel against the per-measurement reference (both run TS 38.304 as above)
    pols = [{"name": "r", "rule": "reselection", "q_hyst_db": 2.0, "s_intrasearch_p_db": 30.0,
             "distance_thresh_km": 200.0}]
    scen = _scenario(pols, constellation, link)
    fast = run_scenario(scen, kernel="fast")[0][0].records
    naive = run_scenario(scen, kernel="naive")[0][0].records
    assert fast.handovers
    assert fast.signature() == naive.signature()


def test_growing_hysteresis_never_adds_reselections():
    # Issue 12 check: on one trace (same seed, same measurements), the R-criterion with a
    # growing Qhyst never increases the reselection count (a larger Qhyst only removes
    # occasions on which a neighbour ranks above the camped cell).
    hyst = [0, 1, 2, 3, 4, 6, 8, 12, 16, 24]
    scen = _scenario([{"name": f"h{h}", "rule": "reselection", "q_hyst_db": float(h)}
                      for h in hyst])
    results = run_scenario(scen, kernel="fast")[0]
    counts = [sum(h[3] == "reselection" for h in r.records.handovers) for r in results]
    assert counts[0] > counts[-1]
    assert all(b <= a for a, b in zip(counts, counts[1:])), counts


def test_summary_columns(tmp_path):
    # camped + not camped = the hour (common practice: the two states of an idle terminal)
    from dwell.run import build_tables
    scen = _scenario([{"name": "r", "rule": "reselection"}, {"name": "a", "rule": "a3"}],
                     duration_s=1800.0)
    results, geo = run_scenario(scen, kernel="fast")
    s = build_tables(scen, results, geo, check=True).frames["summary"].set_index("policy")
    r = s.loc["r"]
    assert r["reselections"] > 0 and r["radio_link_failures"] == 0
    assert r["camped_s_per_hour"] + r["not_camped_s_per_hour"] == pytest.approx(3600.0)
    assert r["reselections_per_hour"] == pytest.approx(r["reselections"] / 0.5)
    assert math.isnan(s.loc["a", "camped_s_per_hour"])


@pytest.mark.parametrize("key, value", [("q_hyst_db", 30.0), ("t_reselection_s", -1.0),
                                        ("s_intrasearch_p_db", 70.0),
                                        ("distance_thresh_km", -5.0)])
def test_bad_keys(key, value):
    from dwell.io.errors import InputError
    with pytest.raises(InputError) as e:
        _scenario([{"name": "r", "rule": "reselection", key: value}], duration_s=60.0)
    assert key in str(e.value) and "t.toml" in str(e.value)


def test_camping_loss_is_followed_by_cell_selection_not_reestablishment():
    # TS 38.331 5.3.7 (re-establishment, T311) applies in RRC_CONNECTED only; an idle terminal
    # that finds no suitable cell is out of service until cell selection finds one (TS 38.304
    # 5.2.3 and 5.2.8, "any cell selection") and camps once it has read the cell's system
    # information: here the terminal's interruption_s.  A sparse shell leaves gaps in view.
    sparse = {**SHELL, "satellites": 120, "planes": 12}
    pols = [{"name": f"r{i}", "rule": "reselection", "reestablishment_s": ree}
            for i, ree in enumerate((0.5, 3.0))]
    scen = _scenario(pols, sparse, duration_s=3 * 3600.0, interruption_s=0.2)
    fast = run_scenario(scen, kernel="fast")[0]
    naive = run_scenario(scen, kernel="naive")[0]
    rec = fast[0].records
    assert rec.failures, "the sparse shell should leave the terminal without a suitable cell"
    after_loss = [link for link in rec.links if link[4] not in ("initial", "handover")]
    assert len(after_loss) == len(rec.failures) or len(after_loss) == len(rec.failures) - 1
    assert {link[4] for link in after_loss} == {"cell-selection"}
    for link, lost in zip(after_loss, rec.failures):
        found = link[2] - 0.2                    # the measurement instant a cell was suitable
        assert found >= lost
        assert found / DT == pytest.approx(round(found / DT), abs=1e-6)
    assert rec.idle == []                        # no T311 in idle mode: never "went idle"
    # reestablishment_s is a connected-mode key: it changes nothing here
    assert fast[1].records.signature() == rec.signature()
    assert naive[0].records.signature() == rec.signature()
