"""How a run is labelled: the scenario name defaults to the config file's name, and the
summary header counts in plain English.

Labelling an unnamed job after its input file is common practice (compilers name their output
after the source, plotting tools their figures after the script); "scenario", the old default,
said nothing.  An explicit ``[scenario] name`` is kept as given; scenarios built from a dict
(no file) keep "scenario".
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pandas as pd
import tomli_w

from dwell.io.config import load_scenario, scenario_from_dict
from dwell.run import summary_text

BASE = {"scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 600.0},
        "constellation": [{"kind": "walker-delta", "name": "finch", "satellites": 1,
                           "planes": 1, "phasing": 0, "altitude_km": 700.0,
                           "inclination_deg": 60.0}],
        "terminal": [{"name": "mill-yard", "lat_deg": 40.0, "lon_deg": 5.0}],
        "policy": [{"name": "a3", "rule": "a3", "time_to_trigger_s": 1.28}]}


def _write(tmp_path: Path, name: str, raw: dict) -> Path:
    p = tmp_path / name
    p.write_text(tomli_w.dumps(raw))
    return p


def test_unnamed_scenario_is_labelled_after_its_file(tmp_path):
    scen = load_scenario(_write(tmp_path, "harbour-study.toml", BASE), build=False)
    assert scen.scenario["name"] == "harbour-study"


def test_explicit_name_is_kept(tmp_path):
    raw = {**BASE, "scenario": {**BASE["scenario"], "name": "spring"}}
    scen = load_scenario(_write(tmp_path, "harbour-study.toml", raw), build=False)
    assert scen.scenario["name"] == "spring"


def test_scenario_from_a_dict_keeps_the_old_default():
    assert scenario_from_dict(BASE, "inline", Path("."), build=False).scenario["name"] == "scenario"


def test_summary_header_counts_in_singular_and_plural(tmp_path):
    scen = load_scenario(_write(tmp_path, "one.toml", BASE))
    head = summary_text(scen, pd.DataFrame()).splitlines()[0]
    assert head.startswith("scenario one: 1 satellite, 1 terminal, 1 policy, ")
    raw = {**BASE, "terminal": BASE["terminal"] + [{"name": "ridge", "lat_deg": 0.0,
                                                     "lon_deg": 0.0}],
           "policy": BASE["policy"] + [{"name": "hi", "rule": "highest-elevation"}]}
    head = summary_text(load_scenario(_write(tmp_path, "two.toml", raw)),
                        pd.DataFrame()).splitlines()[0]
    assert ", 2 terminals, 2 policies, " in head


def test_policy_warnings_only_where_policies_run(tmp_path):
    # A policy's timing warnings (here the default time-to-trigger, 0.32 s, below the 1 s
    # period) concern runs of that policy; the pass search never runs one, so it says nothing
    # of them, while still checking the policy tables (common practice: warn where it matters).
    raw = {**BASE, "policy": [{"name": "a3", "rule": "a3"}]}
    path = _write(tmp_path, "quiet.toml", raw)
    said: list[str] = []
    load_scenario(path, warn=said.append, build=False)
    assert any("time_to_trigger_s" in m for m in said)
    said.clear()
    load_scenario(path, warn=said.append, build=False, policy_warnings=False)
    assert said == []
    proc = subprocess.run([sys.executable, "-m", "dwell.cli", "passes", str(path), "-o",
                           str(tmp_path / "p.parquet")], capture_output=True, text=True)
    assert proc.returncode == 0 and "warning" not in proc.stderr, proc.stderr
    bad = _write(tmp_path, "bad.toml", {**BASE, "policy": [{"name": "a3", "rule": "a3",
                                                            "offset_db": "high"}]})
    proc = subprocess.run([sys.executable, "-m", "dwell.cli", "passes", str(bad), "-o",
                           str(tmp_path / "q.parquet")], capture_output=True, text=True)
    assert proc.returncode == 2 and "offset_db" in proc.stderr    # still checked
