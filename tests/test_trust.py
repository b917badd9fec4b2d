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


# ---- 1 and 10. output folders ----------------------------------------------------------------

def test_run_refuses_a_folder_it_did_not_write(tmp_path):
    # the issue's own reproduction: the config and its masks inside the output folder
    folder = tmp_path / "p"
    folder.mkdir()
    (folder / "demo.toml").write_text((ROOT / "configs" / "demo.toml").read_text())
    (folder / "masks").mkdir()
    (folder / "masks" / "quarry-rim.csv").write_bytes(
        (ROOT / "configs" / "masks" / "quarry-rim.csv").read_bytes())
    before = _snapshot(folder)
    listing = _files(tmp_path)
    result = _invoke("run", folder / "demo.toml", "-o", folder)
    _assert_rejected(result, tmp_path, listing, str(folder), "did not write")
    assert _snapshot(folder) == before                 # nothing deleted, nothing changed
    # an explicit --replace does not change that: it replaces run folders only
    result = _invoke("run", folder / "demo.toml", "-o", folder, "--replace")
    _assert_rejected(result, tmp_path, listing, str(folder))
    assert _snapshot(folder) == before


def test_run_folder_is_replaced_only_when_told(tmp_path):
    config = _write(tmp_path, BASE)
    out = tmp_path / "out"
    assert _invoke("run", config, "-o", out).exit_code == 0
    first = _snapshot(out)
    listing = _files(tmp_path)
    _assert_rejected(_invoke("run", config, "-o", out), tmp_path, listing, str(out), "--replace")
    assert _snapshot(out) == first
    # with --replace: the same config gives the same bytes (README), by the atomic rename
    result = _invoke("run", config, "-o", out, "--replace")
    assert result.exit_code == 0, result.output
    assert _snapshot(out) == first
    assert _files(tmp_path) == listing                 # no temporary or old folder left


def test_a_file_added_to_a_run_folder_is_kept(tmp_path):
    config = _write(tmp_path, BASE)
    out = tmp_path / "out"
    assert _invoke("run", config, "-o", out).exit_code == 0
    (out / "notes.txt").write_text("my notes")
    listing = _files(tmp_path)
    _assert_rejected(_invoke("run", config, "-o", out, "--replace"), tmp_path, listing,
                     "notes.txt")


PLUGIN_WORKS = '''
import pathlib
from dwell.policies.base import Policy


class Works(Policy):
    """Leaves a mark as soon as the simulation asks it for a decision."""

    rule = "works"
    KEYS = {}

    def step(self, rows, r, link):
        pathlib.Path(__file__).with_name("simulated").write_text("the simulation ran")
        return None
'''


@pytest.mark.parametrize("target", [".", ".."])
def test_current_folder_and_its_parent_are_refused_before_work(tmp_path, target, monkeypatch):
    work = tmp_path / "work"
    work.mkdir()
    (work / "works.py").write_text(PLUGIN_WORKS)
    config = _write(work, _edited(lambda r: r.update(
        policy=[{"name": "plug", "rule": "works.py:Works"}])))
    monkeypatch.chdir(work)
    listing = _files(tmp_path)
    _assert_rejected(_invoke("run", config.name, "-o", target), tmp_path, listing, target)
    assert not (work / "simulated").exists()        # refused before the computation


def test_symlinked_output_is_refused_before_work(tmp_path):
    # POSIX rename(2) replaces a symbolic link itself, not the folder it points to
    config = _write(tmp_path, BASE)
    real = tmp_path / "real"
    real.mkdir()
    (tmp_path / "link").symlink_to(real)
    listing = _files(tmp_path)
    _assert_rejected(_invoke("run", config, "-o", tmp_path / "link"), tmp_path, listing,
                     "symbolic link")


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="root ignores permission bits")
def test_unwritable_existing_run_folder_is_refused_before_work(tmp_path):
    config = _write(tmp_path, BASE)
    out = tmp_path / "out"
    assert _invoke("run", config, "-o", out).exit_code == 0
    out.chmod(0o555)
    try:
        listing = _files(tmp_path)
        _assert_rejected(_invoke("run", config, "-o", out, "--replace"), tmp_path, listing,
                         str(out), "permission denied")
    finally:
        out.chmod(0o755)


def test_unwritable_existing_folder_check_without_root(tmp_path, monkeypatch):
    # the same check where the tests run as root (who ignores permission bits): os.access
    # answers for the calling user (POSIX access(2)); made to say "no" for the folder
    config = _write(tmp_path, BASE)
    out = tmp_path / "out"
    assert _invoke("run", config, "-o", out).exit_code == 0
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode: False if Path(p) == out and mode & os.W_OK
                        else real_access(p, mode))
    listing = _files(tmp_path)
    _assert_rejected(_invoke("run", config, "-o", out, "--replace"), tmp_path, listing,
                     str(out), "permission denied")


# ---- 8. tracebacks -----------------------------------------------------------------------------

def test_start_in_year_one_is_an_input_error(tmp_path):
    # sgp4's jday (Vallado's Julian-date algorithm) holds for 1900..2100 (from memory)
    _rejects(tmp_path, _edited(lambda r: r["scenario"].update(start="0001-01-01T00:00:00Z")),
             "scenario.start", "0001-01-01")


def test_megabyte_terminal_name_is_an_input_error(tmp_path):
    line = _rejects(tmp_path, _edited(lambda r: r["terminal"][0].update(name="x" * 1_000_000)),
                    "terminal[1].name", "characters")
    assert len(line) < 300   # one readable line, not a megabyte


PLUGIN_RAISES = '''
from dwell.policies.base import Policy


class Raises(Policy):
    rule = "raises"
    KEYS = {}

    def step(self, rows, r, link):
        raise RuntimeError("the rule failed")
'''


@pytest.mark.parametrize("workers, kernel", [("1", "fast"), ("1", "naive"), ("2", "fast")])
def test_plugin_step_that_raises_is_one_line_naming_file_and_line(tmp_path, workers, kernel):
    (tmp_path / "raises.py").write_text(PLUGIN_RAISES)
    raw = _edited(lambda r: r.update(policy=[{"name": "plug", "rule": "raises.py:Raises"}]))
    raw["terminal"].append({"name": "second", "lat_deg": 10.0, "lon_deg": 20.0})
    config = _write(tmp_path, raw)
    listing = _files(tmp_path)
    result = _invoke("run", config, "-o", tmp_path / "out", "--workers", workers,
                     "--kernel", kernel)
    # the raise is on line 10 of the plug-in text above (line 1 is empty)
    line = _assert_rejected(result, tmp_path, listing, "raises.py", "line 10", "Raises.step",
                            "RuntimeError", "the rule failed")
    assert "Traceback" not in line


# ---- 9. silently accepted ---------------------------------------------------------------------

def test_empty_terminal_name_is_refused(tmp_path):
    # README: terminals are labelled by name in every output table
    _rejects(tmp_path, _edited(lambda r: r["terminal"][0].update(name="")), "terminal[1].name",
             "empty")


def test_toml_with_byte_order_mark_is_accepted(tmp_path):
    # RFC 3629 section 6: a UTF-8 byte-order mark (EF BB BF) may start a text and is no content
    config = tmp_path / "bom.toml"
    config.write_bytes(b"\xef\xbb\xbf" + tomli_w.dumps(BASE).encode())
    result = _invoke("run", config, "-o", tmp_path / "out")
    assert result.exit_code == 0, result.output
    assert (tmp_path / "out" / "summary.parquet").is_file()


def test_mask_export_at_nan_seconds_is_refused(tmp_path):
    (tmp_path / "m.csv").write_text("azimuth_deg,elevation_deg\n0,10\n180,20\n")
    config = _write(tmp_path, _edited(lambda r: r["terminal"][0].update(mask="m.csv")))
    listing = _files(tmp_path)
    for at in ("nan", "inf", "-5"):
        result = _invoke("mask", config, "--terminal", "mill", "-o", tmp_path / "x.csv",
                         "--at-s", at)
        _assert_rejected(result, tmp_path, listing, "--at-s")


def _tle_lines(number: int, inclination_deg: float = 53.0, mean_motion_deg: float = 0.0):
    from sgp4.api import WGS72, Satrec
    from sgp4.exporter import export_tle

    from dwell.orbits.timebase import Epoch, parse_utc
    epoch_days = Epoch(parse_utc(START)).sgp4_epoch_days()
    n_rad_min = math.sqrt(398600.8 / (6378.135 + 600.0) ** 3) * 60.0  # WGS-72 (SGP4's constants)
    sat = Satrec()
    sat.sgp4init(WGS72, "i", number, epoch_days, 0.0, 0.0, 0.0, 0.001, 0.0,
                 math.radians(inclination_deg), math.radians(mean_motion_deg), n_rad_min, 0.0)
    return export_tle(sat)


def _checksum(line: str) -> str:
    # Spacetrack Report No. 3 (from memory): the sum of the digits of columns 1-68, a minus
    # sign counting 1, modulo 10
    return str(sum(int(c) if c.isdigit() else (1 if c == "-" else 0) for c in line[:68]) % 10)


def _tle_config(tmp_path: Path, body: str) -> Path:
    (tmp_path / "set.tle").write_text(body)
    return _write(tmp_path, _edited(lambda r: r["constellation"].append(
        {"kind": "tle", "path": "set.tle"})))


def test_letter_inside_a_tle_number_with_a_corrected_checksum_is_refused(tmp_path):
    l1, l2 = _tle_lines(301)
    # line 2 columns 9-16 hold the inclination (Spacetrack Report No. 3); put a letter in it
    # and repair the checksum, so only the field check can catch it
    bad = l2[:10] + "A" + l2[11:68]
    bad += _checksum(bad)
    config = _tle_config(tmp_path, f"obj\n{l1}\n{bad}\n")
    listing = _files(tmp_path)
    line = _assert_rejected(_invoke("run", config, "-o", tmp_path / "out"), tmp_path, listing,
                            "set.tle", "line 3", "columns 9-16", "inclination")
    assert bad[:20] not in line                         # item 12: not the content


def test_identical_element_sets_are_refused_and_one_number_twice_warned(tmp_path):
    a1, a2 = _tle_lines(401)
    config = _tle_config(tmp_path, f"obj-a\n{a1}\n{a2}\nobj-b\n{a1}\n{a2}\n")
    listing = _files(tmp_path)
    # the same element set twice is one satellite simulated twice, in the same place
    _assert_rejected(_invoke("run", config, "-o", tmp_path / "out"), tmp_path, listing,
                     "set.tle", "line 5", "line 2")
    # one catalogue number with other elements (another epoch, say): simulated twice, warned
    b1, b2 = _tle_lines(401, mean_motion_deg=180.0)
    config = _tle_config(tmp_path, f"obj-a\n{a1}\n{a2}\nobj-b\n{b1}\n{b2}\n")
    result = _invoke("run", config, "-o", tmp_path / "out2")
    assert result.exit_code == 0, result.output
    warnings = [ln for ln in result.stderr.splitlines() if ln.startswith("warning")]
    assert len(warnings) == 1 and "catalogue number 00401" in warnings[0], result.stderr


# CCSDS 502.0-B-2 (from memory): the OMM mean elements; MEAN_MOTION in rev/day
OMM_HEADER = ("OBJECT_NAME,OBJECT_ID,EPOCH,MEAN_MOTION,ECCENTRICITY,INCLINATION,RA_OF_ASC_NODE,"
              "ARG_OF_PERICENTER,MEAN_ANOMALY,EPHEMERIS_TYPE,CLASSIFICATION_TYPE,NORAD_CAT_ID,"
              "ELEMENT_SET_NO,REV_AT_EPOCH,BSTAR,MEAN_MOTION_DOT,MEAN_MOTION_DDOT").split(",")
OMM_ROW = ["obj-a", "2027-001A", "2027-05-10T00:00:00.000000", "14.9", "0.001", "53.0", "10.0",
           "0.0", "0.0", "0", "U", "11", "999", "1", "0.0", "0.0", "0.0"]


@pytest.mark.parametrize("field, value", [("MEAN_MOTION", "-14.9"), ("ECCENTRICITY", "nan"),
                                          ("ECCENTRICITY", "1.2"), ("INCLINATION", "inf")])
def test_omm_elements_out_of_their_range_are_refused(tmp_path, field, value):
    # a closed orbit has mean motion > 0 and eccentricity in [0, 1) (common practice; Vallado,
    # Fundamentals of Astrodynamics and Applications, ch. 2, from memory)
    row = list(OMM_ROW)
    row[OMM_HEADER.index(field)] = value
    (tmp_path / "set.csv").write_text(",".join(OMM_HEADER) + "\n" + ",".join(row) + "\n")
    config = _write(tmp_path, _edited(lambda r: r["constellation"].append(
        {"kind": "omm", "path": "set.csv"})))
    listing = _files(tmp_path)
    _assert_rejected(_invoke("run", config, "-o", tmp_path / "out"), tmp_path, listing,
                     "set.csv", f"record 1.{field}")


def test_omm_valid_record_runs(tmp_path):
    # the bad cases above differ from this one by one field
    (tmp_path / "set.csv").write_text(",".join(OMM_HEADER) + "\n" + ",".join(OMM_ROW) + "\n")
    config = _write(tmp_path, _edited(lambda r: r["constellation"].append(
        {"kind": "omm", "path": "set.csv"})))
    assert _invoke("run", config, "-o", tmp_path / "out").exit_code == 0


# ---- 12. errors never repeat the content of a file they could not parse -----------------------

SECRET = "root:x:0:0:root:/root:/bin/bash"


@pytest.mark.parametrize("key", ["mask", "track", "tle", "omm", "config"])
def test_error_never_echoes_the_file(tmp_path, key):
    # a path pointed at an account database: the message names the file and line, not the text
    secret = tmp_path / "accounts"
    secret.write_text(SECRET + "\ndaemon:x:1:1:daemon:/usr/sbin:/usr/sbin/nologin\n")
    if key == "config":
        config, needles = secret, ["accounts", "line 1"]
    else:
        def edit(raw):
            if key in ("mask", "track"):
                raw["terminal"][0][key] = str(secret)
            else:
                raw["constellation"].append({"kind": key, "path": str(secret), **(
                    {"format": "csv"} if key == "omm" else {})})
        config, needles = _write(tmp_path, _edited(edit)), ["accounts"]
    listing = _files(tmp_path)
    line = _assert_rejected(_invoke("run", config, "-o", tmp_path / "out"), tmp_path, listing,
                            *needles)
    for piece in ("root:x", "/bin/bash", "daemon", "nologin"):
        assert piece not in line, line


# ---- 11. plug-ins run only where policies run -------------------------------------------------

PLUGIN_MARKS = '''
import pathlib
pathlib.Path(__file__).with_name("plugin-ran").write_text("the plug-in ran")
from dwell.policies.base import Policy


class Marks(Policy):
    rule = "marks"
    KEYS = {}

    def step(self, rows, r, link):
        return None
'''


def _marking_config(tmp_path: Path) -> Path:
    (tmp_path / "marks.py").write_text(PLUGIN_MARKS)
    raw = _edited(lambda r: r.update(policy=[{"name": "a3", "rule": "a3"},
                                             {"name": "plug", "rule": "marks.py:Marks"}]))
    return _write(tmp_path, raw)


def test_passes_does_not_run_a_plugin(tmp_path):
    config = _marking_config(tmp_path)
    result = _invoke("passes", config, "-o", tmp_path / "p.parquet")
    assert result.exit_code == 0, result.output
    assert not (tmp_path / "plugin-ran").exists()


def test_missing_plugin_file_is_still_an_error_where_it_is_not_run(tmp_path):
    config = _marking_config(tmp_path)
    (tmp_path / "marks.py").unlink()
    listing = _files(tmp_path)
    _assert_rejected(_invoke("passes", config, "-o", tmp_path / "p.parquet"), tmp_path, listing,
                     "policy[2].rule", "not found")


def test_compare_and_plot_of_a_results_folder_do_not_run_its_plugin(tmp_path):
    config = _marking_config(tmp_path)
    out = tmp_path / "out"
    assert _invoke("run", config, "-o", out).exit_code == 0
    assert (tmp_path / "plugin-ran").exists()           # dwell run runs policies: it loads it
    (tmp_path / "plugin-ran").unlink()
    for args in (("compare", out), ("plot", out)):
        result = _invoke(*args)
        assert result.exit_code == 0, (args, result.output, result.exception)
        assert not (tmp_path / "plugin-ran").exists(), args
