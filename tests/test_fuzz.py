"""Property tests: no input, however malformed, escapes as anything but an InputError.

The rule under test (README, "Every command checks all of its input before it starts. Bad input
prints one line naming the file, the key (or line) and the value, exits with status 2, and
writes nothing"; the hardening issue): checking code may only ever raise
:class:`dwell.errors.InputError`, and the command line may only ever exit with 0 or 2.

1. random TOML-like dicts (known keys plus junk, every TOML value type, NaN and infinities) into
   :func:`dwell.config.scenario_from_dict`;
2. random text as a mask CSV, a track CSV, a TLE file and an OMM CSV, loaded with ``build=True``;
3. random bytes (and byte-mutated valid files) as a scenario file and a sweep file through the
   command line: exit status 0 or 2, never 1, never a traceback.

Examples are bounded (``max_examples`` below) and derandomized, so the file is deterministic and
finishes in well under 30 s on two cores; no example database is written.
"""

from __future__ import annotations

import copy
import datetime as dt
import math
from pathlib import Path

import pytest
import tomli_w
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from dwell import obstruction, policies
from dwell.cli import main
from dwell.constellations import SOURCES
from dwell.io.config import (
    CONSTELLATION_COMMON,
    SCENARIO_KEYS,
    TERMINAL_KEYS,
    scenario_from_dict,
)
from dwell.io.errors import InputError
from dwell.io.schema import REQUIRED
from dwell.obstruction import canyon as canyon_mod
from dwell.obstruction import los as los_mod
from dwell.radio import link

# Bounded, deterministic runs: derandomize fixes the example sequence (no flaky failures), and
# no database is written into the repository.
FUZZ = settings(max_examples=150, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much,
                                       HealthCheck.data_too_large,
                                       HealthCheck.function_scoped_fixture])
FUZZ_CLI = settings(FUZZ, max_examples=60)  # each example is a full CLI invocation

policies.load_rule("a3", "", "")  # fills policies.RULES with the built-in rules

# ---- what the scenario schema knows (key names are the README's contract) --------------------

SCHEMAS: dict[str, dict] = {
    "scenario": SCENARIO_KEYS,
    "constellation": {**CONSTELLATION_COMMON,
                      **{k: f for s in SOURCES.values() for k, f in s.keys.items()}},
    "terminal": TERMINAL_KEYS,
    "link": link.KEYS,
    "policy": {**policies.base.COMMON_KEYS,
               **{k: f for c in policies.RULES.values() for k, f in c.KEYS.items()}},
    "canyon": canyon_mod.KEYS,
    "los": los_mod.KEYS,
    "drive": obstruction.DRIVE_KEYS,
}
KNOWN_KEYS: dict[str, list[str]] = {kind: sorted(spec) for kind, spec in SCHEMAS.items()}
WORDS = sorted({*SOURCES, *policies.RULES, *canyon_mod.LAWS, *los_mod.ENVIRONMENTS,
                "electronic", "mechanical", "nadir", "terminal", "d1", "t1+a3", "elevation",
                "2027-05-10T00:00:00Z", "2027-05-10T00:00:00", "nan", "inf", "-1", "",
                "masks/x.csv", "p.py:P"})

# A valid scenario touching every kind of table; mutations start from it so that each check is
# reached with the rest of the file valid.  Sizes are small: a successful build stays cheap.
VALID: dict = {
    "scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 3600, "seed": 3},
    "constellation": [
        {"kind": "walker-delta", "name": "a", "satellites": 12, "planes": 3, "phasing": 1,
         "altitude_km": 600, "inclination_deg": 55},
        {"kind": "walker-star", "name": "b", "satellites": 6, "planes": 2, "altitude_km": 800,
         "inclination_deg": 87},
        {"kind": "isotropic", "name": "c", "satellites": 5, "altitude_km": 700},
        {"kind": "random-planes", "name": "d", "planes": 2, "per_plane": 2, "altitude_km": 900},
    ],
    "terminal": [
        {"name": "s", "lat_deg": 40.0, "lon_deg": 10.0},
        {"name": "c", "lat_deg": 41.0, "lon_deg": 11.0, "canyon": {"width_m": 20.0},
         "drive": {"speed_m_s": 10.0}, "los": {"environment": "urban"}},
    ],
    "link": {"shadowing_std_db": 2.0, "measurement_noise_db": 1.0},
    "policy": [
        {"name": "p1", "rule": "a3", "time_to_trigger_s": 0.32},
        {"name": "p2", "rule": "cho", "condition": "d1+a3"},
        {"name": "p3", "rule": "highest-elevation", "hysteresis_deg": 2.0},
        {"name": "p4", "rule": "until-lost", "then": "rsrp"},
    ],
}

scalars = st.one_of(
    st.integers(min_value=-5, max_value=400),
    st.integers(),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0, -0.0, 1e-300, 1e300, math.nan, math.inf, -math.inf]),
    st.text(max_size=12),
    st.sampled_from(WORDS),
    st.booleans(),
    st.datetimes(timezones=st.sampled_from([None, dt.timezone.utc])),  # TOML date-time literals
    st.dates(),
    st.times(),
)


def plausible(kind: str, key: str):
    """Values near what the key expects (its choices, its default scaled, small numbers), so
    that edits often pass the type check and reach the range and cross-key checks."""
    f = SCHEMAS[kind].get(key)
    options = [st.integers(-2, 120), st.floats(-5.0, 1000.0)]
    if f is not None:
        if f.choices:
            options.append(st.sampled_from(list(f.choices)))
        if isinstance(f.default, (int, float)) and not isinstance(f.default, bool) and \
                f.default is not REQUIRED:
            options.append(st.floats(0.0, 3.0).map(
                lambda x, d=f.default: d * x if isinstance(d, float) else int(d * x)))
        if f.item_kinds:
            options.append(st.lists(st.floats(-5.0, 100.0), max_size=4))
    return st.one_of(options)


keys = st.one_of(st.sampled_from(sorted({k for v in KNOWN_KEYS.values() for k in v})),
                 st.text(max_size=8))
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(keys, inner, max_size=4)), max_leaves=10)


def _tables(raw: dict) -> list[tuple[dict, str]]:
    """Every dict in the scenario with the schema it belongs to (for picking a key)."""
    out = []
    for top, v in raw.items():
        if top not in KNOWN_KEYS:
            continue
        items = v if isinstance(v, list) else [v]
        for t in items:
            if isinstance(t, dict):
                out.append((t, top))
                for sub in ("canyon", "los", "drive"):
                    if top == "terminal" and isinstance(t.get(sub), dict):
                        out.append((t[sub], sub))
    return out


@st.composite
def scenario_dicts(draw) -> dict:
    """A valid scenario with a few random edits, or (sometimes) a random dict altogether."""
    if draw(st.integers(0, 9)) == 0:
        return draw(st.dictionaries(st.one_of(st.sampled_from(list(VALID)), st.text(max_size=6)),
                                    values, max_size=5))
    raw = copy.deepcopy(VALID)
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(["set"] * 6 + ["delete", "delete", "replace", "top"]))
        tables = _tables(raw)
        if op == "top" or not tables:
            raw[draw(st.one_of(st.sampled_from(list(VALID)), st.text(max_size=6)))] = draw(values)
            continue
        table, kind = draw(st.sampled_from(tables))
        if op == "set":
            known = st.sampled_from(KNOWN_KEYS[kind])
            key = draw(st.one_of(known, known, known, st.text(max_size=8)))
            table[key] = draw(st.one_of(values, *[plausible(kind, key)] * 3))
        elif op == "delete" and table:
            del table[draw(st.sampled_from(sorted(table)))]
        elif op == "replace":
            top = draw(st.sampled_from(sorted(raw)))
            raw[top] = draw(values)
    return raw


def _cheap_to_build(scen) -> bool:
    """Building is only attempted for small constellations and streets (a fuzzed size of 10^12
    satellites is valid input that would simply take forever)."""
    n = 0
    for c in scen.constellations:
        n += c.get("satellites") or (c.get("planes", 1) * c.get("per_plane", 1))
    streets = [t["canyon"] for t in scen.terminals if t.get("canyon")]
    return n <= 2000 and all(c["street_length_m"] * c["buildings_per_km"] <= 2e6 and
                             c["street_length_m"] <= 1e6 for c in streets)


# ---- 1. dicts into scenario_from_dict ---------------------------------------------------------

@FUZZ
@given(raw=scenario_dicts())
def test_scenario_dicts_raise_only_input_error(raw, tmp_path_factory):
    # README: bad input is reported as an InputError (one line), never another exception.
    base = tmp_path_factory.getbasetemp()
    try:
        scen = scenario_from_dict(copy.deepcopy(raw), "fuzz.toml", base, build=False)
    except InputError as exc:
        assert "\n" not in str(exc)  # README: one line
        return
    if _cheap_to_build(scen):
        try:
            scenario_from_dict(copy.deepcopy(raw), "fuzz.toml", base, build=True)
        except InputError as exc:
            assert "\n" not in str(exc)


def test_valid_base_builds(tmp_path):
    # the mutation base must itself be valid, else property 1 tests nothing but the first check;
    # its tables ask for 12 + 6 + 5 + 2 x 2 satellites
    scen = scenario_from_dict(copy.deepcopy(VALID), "fuzz.toml", tmp_path)
    assert len(scen.constellation) == 12 + 6 + 5 + 2 * 2


# ---- 2. random file contents loaded with build=True -------------------------------------------

NUMBERISH = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr),
                      st.integers(-400, 400).map(str), st.text(max_size=6),
                      st.sampled_from(["", " ", "nan", "1e999", "-0", "360", "0",
                                       "2027-05-10T00:10:00Z"]))


def _csv_text(header: str, ncols: int):
    # mostly the right number of cells, so that the value checks are reached
    width = st.one_of(st.just(ncols), st.just(ncols), st.just(ncols), st.integers(0, ncols + 1))
    row = width.flatmap(lambda n: st.lists(NUMBERISH, min_size=n, max_size=n)).map(
        lambda cells: ",".join(c.replace("\n", " ").replace("\r", " ").replace(",", ";")
                               for c in cells))
    structured = st.lists(row, max_size=6).map(lambda rows: "\n".join([header, *rows]) + "\n")
    return st.one_of(st.text(max_size=200), structured,
                     st.lists(row, max_size=6).map(lambda r: "# comment\n\n" + header + "\n" +
                                                   "\n".join(r)))


def _tle_lines() -> tuple[str, str]:
    """A valid element set written by the sgp4 package's own exporter."""
    from sgp4.api import WGS72, Satrec
    from sgp4.exporter import export_tle
    sat = Satrec()
    sat.sgp4init(WGS72, "i", 77, 28253.0, 1e-4, 0.0, 0.0, 0.001, 0.5, 0.9, 1.0, 0.0655, 2.0)
    return export_tle(sat)


TLE1, TLE2 = _tle_lines()


@st.composite
def tle_text(draw) -> str:
    if draw(st.booleans()):
        return draw(st.text(max_size=300))
    lines = [draw(st.sampled_from(["", "obj", "0 obj"])), TLE1, TLE2]
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, 2))
        s = lines[i]
        op = draw(st.sampled_from(["char", "char", "cut", "drop", "dup", "fixsum"]))
        if op == "char" and s:
            k = draw(st.integers(0, len(s) - 1))
            s = s[:k] + draw(st.sampled_from(list("0123456789 .-+eE abc"))) + s[k + 1:]
        elif op == "cut":
            s = s[:draw(st.integers(0, max(0, len(s))))]
        elif op == "drop":
            s = ""
        elif op == "dup":
            lines.append(s)
        elif op == "fixsum" and len(s) == 69:
            from sgp4.io import (
                compute_checksum,  # a garbled field behind a valid checksum
            )
            s = s[:68] + str(compute_checksum(s[:68] + "0"))
        lines[i] = s
    return "\n".join(lines) + "\n"


OMM_HEADER = ("OBJECT_NAME,OBJECT_ID,EPOCH,MEAN_MOTION,ECCENTRICITY,INCLINATION,RA_OF_ASC_NODE,"
              "ARG_OF_PERICENTER,MEAN_ANOMALY,EPHEMERIS_TYPE,CLASSIFICATION_TYPE,NORAD_CAT_ID,"
              "ELEMENT_SET_NO,REV_AT_EPOCH,BSTAR,MEAN_MOTION_DOT,MEAN_MOTION_DDOT")
OMM_ROW = ["x", "2027-001A", "2027-05-10T00:00:00.000000", "15.0", "0.001", "53", "10", "0", "0",
           "0", "U", "11", "999", "1", "0.0001", "0", "0"]


@st.composite
def omm_text(draw) -> str:
    kind = draw(st.integers(0, 2))
    if kind == 0:
        return draw(st.text(max_size=300))
    row = list(OMM_ROW)
    for _ in range(draw(st.integers(1, 4))):
        cell = draw(NUMBERISH).replace(",", ";").replace("\n", " ")
        row[draw(st.integers(0, len(row) - 1))] = cell
    header = OMM_HEADER
    if kind == 2:  # drop a column from the header
        cols = header.split(",")
        del cols[draw(st.integers(0, len(cols) - 1))]
        header = ",".join(cols)
    return header + "\n" + ",".join(row) + "\n"


FILE_CASES = {
    "mask": (_csv_text("azimuth_deg,elevation_deg", 2), "mask.csv"),
    "track": (_csv_text("time,lat_deg,lon_deg,alt_m", 4), "track.csv"),
    "tle": (tle_text(), "set.tle"),
    "omm": (omm_text(), "set.csv"),
}


def _file_scenario(case: str, name: str) -> dict:
    raw = {"scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 600},
           "constellation": [{"kind": "walker-delta", "name": "a", "satellites": 4, "planes": 2,
                              "altitude_km": 600, "inclination_deg": 55}],
           "terminal": [{"name": "s", "lat_deg": 40.0, "lon_deg": 10.0}]}
    if case in ("mask", "track"):
        raw["terminal"][0][case] = name
    else:
        raw["constellation"] = [{"kind": case, "name": "e", "path": name}]
    return raw


@pytest.mark.parametrize("case", sorted(FILE_CASES))
def test_file_contents_raise_only_input_error(case, tmp_path_factory):
    strategy, name = FILE_CASES[case]
    folder = tmp_path_factory.mktemp(f"fuzz-{case}")

    @FUZZ
    @given(body=strategy)
    def check(body):
        (folder / name).write_text(body, encoding="utf-8", errors="surrogatepass")
        try:  # README: referenced files are checked with the scenario; only InputError escapes
            scenario_from_dict(_file_scenario(case, name), "fuzz.toml", folder, build=True)
        except InputError as exc:
            assert "\n" not in str(exc)

    check()


# ---- 3. bytes through the command line --------------------------------------------------------

def _small_config(folder: Path) -> bytes:
    (folder / "mask.csv").write_text("azimuth_deg,elevation_deg\n0,10\n180,20\n")
    raw = {"scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 600},
           "constellation": [{"kind": "walker-delta", "name": "a", "satellites": 4, "planes": 2,
                              "phasing": 1, "altitude_km": 600, "inclination_deg": 55}],
           "terminal": [{"name": "s", "lat_deg": 40.0, "lon_deg": 10.0, "mask": "mask.csv"}],
           "policy": [{"name": "p", "rule": "a3", "hysteresis_db": 1.0}]}
    return tomli_w.dumps(raw).encode()


TOML_BYTES = b'0123456789.-+_ =\'"[]{},#\nxeZT:'


@st.composite
def mutated_bytes(draw, base: bytes) -> bytes:
    """Random bytes, or a valid file with a few bytes changed (mostly to TOML-ish ones, so that
    many results still parse and reach the checks, and some still run)."""
    if draw(st.integers(0, 4)) == 0:
        return draw(st.binary(max_size=400))
    one = st.one_of(st.sampled_from(list(TOML_BYTES)), st.sampled_from(list(TOML_BYTES)),
                    st.sampled_from(list(TOML_BYTES)), st.integers(0, 255))
    data = bytearray(base)
    for _ in range(draw(st.integers(0, 3))):
        k = draw(st.integers(0, len(data)))
        op = draw(st.sampled_from(["flip", "insert", "delete"]))
        if op == "flip" and k < len(data):
            data[k] = draw(one)
        elif op == "insert":
            data[k:k] = bytes(draw(st.lists(one, min_size=1, max_size=3)))
        elif op == "delete":
            del data[k:k + draw(st.integers(1, 8))]
    return bytes(data)


def _assert_clean_exit(result) -> None:
    # README: status 2 for bad input, 0 otherwise; an uncaught exception would be status 1
    assert result.exit_code in (0, 2), (result.exit_code, result.output, result.exception)
    assert "Traceback" not in result.output
    if result.exit_code == 2:
        lines = result.stderr.splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: "), result.stderr


def test_config_bytes_through_cli(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz-cli")
    base = _small_config(folder)
    runner = CliRunner()

    # `dwell mask` reads and builds the whole scenario (constellation, sites, files) and then
    # writes a small CSV: the full input path without the cost of a simulation.
    @FUZZ_CLI
    @given(body=mutated_bytes(base))
    def check(body):
        cfg = folder / "cfg.toml"
        cfg.write_bytes(body)
        out = folder / "m.csv"
        result = runner.invoke(main, ["mask", str(cfg), "--terminal", "s", "-o", str(out)])
        _assert_clean_exit(result)
        if result.exit_code == 2:
            assert not out.exists()  # README: bad input writes nothing
        out.unlink(missing_ok=True)
        out.with_suffix(".png").unlink(missing_ok=True)

    check()


def test_sweep_bytes_through_cli(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz-sweep")
    (folder / "base.toml").write_bytes(_small_config(folder))
    axis = {"key": "policy.p.hysteresis_db", "values": [0.0, 1.0]}
    base = tomli_w.dumps({"sweep": {"base": "base.toml"}, "axis": [axis]}).encode()
    runner = CliRunner()

    @FUZZ_CLI
    @given(body=mutated_bytes(base))
    def check(body):
        sw = folder / "sw.toml"
        sw.write_bytes(body)
        out = folder / "out"
        result = runner.invoke(main, ["sweep", str(sw), "-o", str(out), "--dry-run"])
        _assert_clean_exit(result)
        assert not out.exists()  # --dry-run and bad input both write nothing

    check()
