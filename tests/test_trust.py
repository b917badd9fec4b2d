"""Trustworthy results (issue 13): no data loss, no crash on common scenarios, no traceback and no
silent acceptance of bad input, plug-ins run only where policies run, numbers that do not mislead.

Each test reproduces one defect of the issue and fails before its fix.  The contracts come from
the README ("Bad input prints one line naming the file, the key (or line) and the value, exits
with status 2, and writes nothing"; "written under a temporary name and renamed into place, so
it is complete or absent") and from outside sources named beside each check: the TLE format
(Hoots & Roehrich, Spacetrack Report No. 3, 1980), CCSDS 502.0-B-2 (OMM), RFC 3629 / the
Unicode standard (byte-order mark), POSIX (file systems, signals), skyfield (reference geometry).

Cost: small scenarios (200 satellites, 10 minutes) except where a defect needs more; about a
minute in all on two cores.
"""

from __future__ import annotations

import copy
import math
import os
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import tomli_w
from click.testing import CliRunner

from dwell.cli import main

ROOT = Path(__file__).resolve().parents[1]
QUICK = ROOT / "configs" / "quick.toml"
START = "2027-05-10T00:00:00Z"

BASE: dict = {
    "scenario": {"start": START, "duration_s": 600},
    "constellation": [{"kind": "walker-delta", "name": "shell", "satellites": 200, "planes": 10,
                       "phasing": 1, "altitude_km": 600, "inclination_deg": 55}],
    "terminal": [{"name": "mill", "lat_deg": 44.2, "lon_deg": 8.9}],
    "policy": [{"name": "a3", "rule": "a3", "hysteresis_db": 1.0, "time_to_trigger_s": 0.32}],
}


# ---- helpers ----------------------------------------------------------------------------------

def _files(folder: Path) -> set[Path]:
    return {p.relative_to(folder) for p in folder.rglob("*")}


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def _write(folder: Path, raw: dict, name: str = "scenario.toml") -> Path:
    path = folder / name
    path.write_text(tomli_w.dumps(raw))
    return path


def _edited(edit) -> dict:
    raw = copy.deepcopy(BASE)
    edit(raw)
    return raw


def _invoke(*args: str):
    return CliRunner().invoke(main, [str(a) for a in args])


def _assert_rejected(result, folder: Path, before: set[Path], *needles: str) -> str:
    """README contract: status 2, one line on stderr naming file/key/value, nothing written."""
    assert result.exit_code == 2, (result.exit_code, result.output, result.exception)
    assert result.stdout == ""
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr
    line = lines[0]
    assert line.startswith("error: "), line
    for needle in needles:
        assert needle in line, (needle, line)
    assert _files(folder) == before, sorted(map(str, _files(folder) ^ before))
    return line


def _rejects(tmp_path: Path, raw: dict, *needles: str) -> str:
    config = _write(tmp_path, raw)
    before = _files(tmp_path)
    return _assert_rejected(_invoke("run", config, "-o", tmp_path / "out"), tmp_path, before,
                            config.name, *needles)


# ---- 2. workers whose terminals see nothing ---------------------------------------------------

def _quick_hour(tmp_path: Path, edit) -> Path:
    raw = tomllib.loads(QUICK.read_text())
    raw["scenario"]["duration_s"] = 3600
    edit(raw)
    return _write(tmp_path, raw, "quick-1h.toml")


@pytest.mark.parametrize("case", ["south-pole", "mask-0-90"])
def test_worker_whose_terminal_sees_nothing_does_not_crash(tmp_path, case):
    # Coverage geometry (Larson & Wertz, SMAD sec. 5.2; from memory): a 55 deg shell at 600 km
    # seen above 20 deg covers latitudes up to about 55 + 11 = 66 deg, so a terminal at 89.5 S
    # sees no satellite; a mask of one point is constant (horizon.py: "one point means a
    # constant mask"), and a 90 deg mask blocks the whole sky.  With the default two workers,
    # one worker then holds a terminal with no window at all.
    if case == "south-pole":
        def edit(raw):
            raw["terminal"][1]["lat_deg"] = -89.5
    else:
        (tmp_path / "all.csv").write_text("azimuth_deg,elevation_deg\n0,90\n")

        def edit(raw):
            raw["terminal"][1]["mask"] = "all.csv"
    config = _quick_hour(tmp_path, edit)
    result = _invoke("run", config, "-o", tmp_path / "out")
    assert result.exit_code == 0, (result.output, result.exception)
    passes = pq.read_table(tmp_path / "out" / "passes.parquet")
    assert str(passes.schema.field("rise_utc").type) == "timestamp[us, tz=UTC]"
    summary = pd.read_parquet(tmp_path / "out" / "summary.parquet")
    blind = summary[summary["terminal"].astype(str) == "ridge-camp"]
    assert len(blind) == 6 and (blind["none_in_view_fraction"] == 1.0).all()
