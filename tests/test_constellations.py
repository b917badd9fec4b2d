"""Constellation sources and scenario checking, against their published definitions and the
sgp4 package (parser, OMM writer, propagator).

- Walker delta / star element patterns (T/P/F notation);
- TLE (two- and three-line) and CCSDS OMM (XML, CSV) files parse to the elements the sgp4
  package itself reads;
- stochastic sources are reproducible per seed, and isotropic plane normals are uniform;
- bad input of every kind is an InputError naming the file, key path (or line) and value, and
  the command line turns it into one line and exit status 2 without writing anything.
"""

from __future__ import annotations

import csv
import importlib.resources
import math
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import kstest
from sgp4.api import Satrec
from sgp4.earth_gravity import wgs72
from sgp4.exporter import export_omm

from dwell.cli import main
from dwell.io.config import Scenario, scenario_from_dict
from dwell.io.errors import InputError

START = "2027-05-10T00:00:00Z"
TERMINAL = {"name": "t1", "lat_deg": 45.0, "lon_deg": 7.0}
ELEMENTS = ("no_kozai", "ecco", "inclo", "nodeo", "argpo", "mo", "bstar", "ndot", "nddot")


def _scenario(base_dir: Path, constellation: list[dict], *, warn=None, **scenario_keys
              ) -> Scenario:
    raw = {"scenario": {"start": START, "duration_s": 600.0, **scenario_keys},
           "constellation": constellation, "terminal": [dict(TERMINAL)]}
    return scenario_from_dict(raw, "test.toml", base_dir, warn=warn)


def _vallado_sets() -> dict[str, tuple[str, str]]:
    """Element sets of the sgp4 package's SGP4-VER.TLE (Vallado et al., AIAA 2006-6753),
    cut to the 69 TLE characters (line 2 carries extra start/stop/step columns)."""
    lines = (importlib.resources.files("sgp4") / "SGP4-VER.TLE").read_text().splitlines()
    out: dict[str, tuple[str, str]] = {}
    for i, ln in enumerate(lines[:-1]):
        if ln.startswith("1 ") and lines[i + 1].startswith("2 "):
            out.setdefault(ln[2:7], (ln[:69], lines[i + 1][:69]))
    return out


def _wrap_deg(x: np.ndarray) -> np.ndarray:
    return (np.asarray(x) + 180.0) % 360.0 - 180.0


def _elements(scen: Scenario) -> np.ndarray:
    return np.array([[getattr(s.satrec, k) for k in ("inclo", "nodeo", "argpo", "mo")]
                     for s in scen.constellation.satellites])


# ---- Walker patterns ----------------------------------------------------------------------------

@pytest.mark.parametrize("kind, spread_deg", [("walker-delta", 360.0), ("walker-star", 180.0)])
@pytest.mark.parametrize("t, p, f, raan0_deg, inc_deg", [(24, 3, 1, 10.0, 53.0),
                                                          (40, 5, 2, 0.0, 70.0),
                                                          (12, 4, 3, 45.0, 87.9)])
def test_walker_elements_follow_tpf_definition(tmp_path, kind, spread_deg, t, p, f, raan0_deg,
                                               inc_deg):
    scen = _scenario(tmp_path, [{"kind": kind, "satellites": t, "planes": p, "phasing": f,
                                 "altitude_km": 550.0, "inclination_deg": inc_deg,
                                 "raan_offset_deg": raan0_deg}])
    sats = [s.satrec for s in scen.constellation.satellites]
    assert len(sats) == t
    # Walker T/P/F (Walker, "Satellite constellations", J. Br. Interplanet. Soc. 37, 1984, from
    # memory): plane j has RAAN j * 360/P (delta; star patterns spread the planes over 180 deg),
    # satellite k of it the argument of latitude k * 360/S + j * F * 360/T, S = T/P.
    s_per = t // p
    j, k = np.divmod(np.arange(t), s_per)
    want_raan = raan0_deg + j * spread_deg / p
    want_u = k * 360.0 / s_per + j * f * 360.0 / t
    got_raan = np.degrees([s.nodeo for s in sats])
    got_u = np.degrees([s.argpo + s.mo for s in sats])   # circular: argument of latitude
    # order-free matching: every defined slot is filled by exactly one satellite
    d = (np.abs(_wrap_deg(want_raan[:, None] - got_raan[None, :]))
         + np.abs(_wrap_deg(want_u[:, None] - got_u[None, :])))
    # tolerance: float rounding of degree <-> radian conversions
    assert (d.min(axis=1) < 1e-9).all() and (d.min(axis=0) < 1e-9).all()
    assert ((d < 1e-9).sum(axis=1) == 1).all()
    np.testing.assert_allclose(np.degrees([s.inclo for s in sats]), inc_deg, rtol=0, atol=1e-12)
    assert all(s.ecco == 0.0 for s in sats)   # Walker patterns are circular


@pytest.mark.parametrize("altitude_km, inc_deg", [(350.0, 0.0), (550.0, 53.0), (1200.0, 87.9),
                                                  (1200.0, 150.0), (8000.0, 45.0)])
def test_walker_mean_motion_gives_altitude(tmp_path, altitude_km, inc_deg):
    scen = _scenario(tmp_path, [{"kind": "walker-delta", "satellites": 1, "planes": 1,
                                 "altitude_km": altitude_km, "inclination_deg": inc_deg}])
    sat = scen.constellation.satellites[0].satrec
    a_km = wgs72.radiusearthkm + altitude_km
    # Kepler's third law with the WGS-72 constants SGP4 uses (sgp4.earth_gravity.wgs72): the
    # altitude is documented as above the 6378.135 km equatorial radius.  Tolerance: rounding.
    n_rad_s = sat.no_kozai / 60.0
    assert (wgs72.mu / n_rad_s ** 2) ** (1 / 3) == pytest.approx(a_km, abs=1e-6)
    # The mean propagated radius over one revolution (the sgp4 package) sits within the
    # first-order J2 scale J2 Re^2 / a of a: SGP4's mean motion is a Kozai mean element, and
    # mean vs osculating semi-major axis and the short-period radial terms differ at first
    # order in J2 (Kozai 1959; Brouwer 1959): 6.4 km at 550 km, measured offsets <= 3.3 km.
    period_min = 2 * math.pi / sat.no_kozai
    tmin = np.linspace(0.0, period_min, 2001)[:-1]
    err, r, _ = sat.sgp4_array(np.full(tmin.size, sat.jdsatepoch), sat.jdsatepochF + tmin / 1440)
    assert not err.any()
    mean_r = float(np.linalg.norm(r, axis=1).mean())
    assert mean_r == pytest.approx(a_km, abs=wgs72.j2 * wgs72.radiusearthkm ** 2 / a_km)


# ---- TLE files ----------------------------------------------------------------------------------

# epochs 2006-06-25..26: within the 30-day spread that triggers a warning
TLE_SETS = ("06251", "28057", "29238", "28129")


@pytest.mark.parametrize("three_line", [True, False])
def test_tle_files_parse_like_sgp4(tmp_path, three_line):
    sets = _vallado_sets()
    names = ["0 TEST OBJECT A", "TEST OBJECT B", "0 TEST OBJECT C", "TEST OBJECT D"]
    body = ""
    for name, n in zip(names, TLE_SETS):
        body += (name + "\n" if three_line else "") + sets[n][0] + "\n" + sets[n][1] + "\n\n"
    (tmp_path / "sets.tle").write_text(body)
    scen = _scenario(tmp_path, [{"kind": "tle", "path": "sets.tle", "name": "ver"}])
    got = scen.constellation.satellites
    assert len(got) == len(TLE_SETS)
    for sat, n in zip(got, TLE_SETS):
        ref = Satrec.twoline2rv(*sets[n])   # the sgp4 package's own TLE reader (WGS-72)
        assert sat.satrec.satnum == ref.satnum
        for key in ELEMENTS + ("jdsatepoch", "jdsatepochF"):
            assert getattr(sat.satrec, key) == getattr(ref, key), (n, key)   # same parser
    if three_line:
        # a name line is either "0 NAME" (three-line convention) or the bare name
        assert [s.name for s in got] == [nm.removeprefix("0 ") for nm in names]
    else:
        assert len(set(s.name for s in got)) == len(got)


def _bad_checksum(sets):
    a1, a2 = sets["06251"]
    b1, b2 = sets["28057"]
    b1 = b1[:68] + str((int(b1[68]) + 1) % 10)
    return "\n" + "\n".join([a1, a2, b1, b2]) + "\n", 4   # leading blank line: file numbering


def _short_line(sets):
    a1, a2 = sets["06251"]
    return "\n".join([a1, a2[:60]]) + "\n", 2


def _orphan_line2(sets):
    a1, a2 = sets["06251"]
    return "\n".join([a1, a2, sets["28057"][1]]) + "\n", 3


@pytest.mark.parametrize("make", [_bad_checksum, _short_line, _orphan_line2])
def test_tle_errors_name_file_and_line(tmp_path, make):
    body, line_no = make(_vallado_sets())
    path = tmp_path / "bad.tle"
    path.write_text(body)
    with pytest.raises(InputError) as info:
        _scenario(tmp_path, [{"kind": "tle", "path": "bad.tle"}])
    msg = str(info.value)
    assert str(path) in msg
    assert re.search(rf"\bline {line_no}\b", msg), msg


@pytest.mark.parametrize("make", [_bad_checksum, _short_line, _orphan_line2])
def test_tle_errors_are_one_line(tmp_path, make):
    # the command line prints str(InputError) as its one error line (dwell.cli, dwell.errors)
    body, _ = make(_vallado_sets())
    (tmp_path / "bad.tle").write_text(body)
    with pytest.raises(InputError) as info:
        _scenario(tmp_path, [{"kind": "tle", "path": "bad.tle"}])
    assert "\n" not in str(info.value), str(info.value)


# ---- OMM files ----------------------------------------------------------------------------------

OMM_META = ("OBJECT_NAME", "OBJECT_ID", "CENTER_NAME", "REF_FRAME", "TIME_SYSTEM",
            "MEAN_ELEMENT_THEORY")
OMM_MEAN = ("EPOCH", "MEAN_MOTION", "ECCENTRICITY", "INCLINATION", "RA_OF_ASC_NODE",
            "ARG_OF_PERICENTER", "MEAN_ANOMALY")
OMM_TLE = ("EPHEMERIS_TYPE", "CLASSIFICATION_TYPE", "NORAD_CAT_ID", "ELEMENT_SET_NO",
           "REV_AT_EPOCH", "BSTAR", "MEAN_MOTION_DOT", "MEAN_MOTION_DDOT")
OMM_SETS = ("06251", "28057", "29238")


def _omm_records() -> tuple[list[dict], list[Satrec]]:
    sets = _vallado_sets()
    refs = [Satrec.twoline2rv(*sets[n]) for n in OMM_SETS]
    # the sgp4 package's own OMM field writer
    recs = [export_omm(s, f"TEST OBJECT {chr(65 + i)}") for i, s in enumerate(refs)]
    return recs, refs


def _write_omm_xml(path: Path, records: list[dict]) -> None:
    """CCSDS OMM in XML (CCSDS 502.0-B Orbit Data Messages, NDM/XML 505.0-B layout):
    ndm / omm / body / segment / (metadata, data / (meanElements, tleParameters))."""
    ndm = ET.Element("ndm")
    for rec in records:
        omm = ET.SubElement(ndm, "omm", id="CCSDS_OMM_VERS", version="2.0")
        header = ET.SubElement(omm, "header")
        ET.SubElement(header, "CREATION_DATE").text = "2027-05-01T00:00:00"
        ET.SubElement(header, "ORIGINATOR").text = "TEST"
        segment = ET.SubElement(ET.SubElement(omm, "body"), "segment")
        groups = [(ET.SubElement(segment, "metadata"), OMM_META)]
        data = ET.SubElement(segment, "data")
        groups += [(ET.SubElement(data, "meanElements"), OMM_MEAN),
                   (ET.SubElement(data, "tleParameters"), OMM_TLE)]
        for parent, keys in groups:
            for key in keys:
                if key in rec:
                    ET.SubElement(parent, key).text = str(rec[key])   # repr: exact floats
    ET.ElementTree(ndm).write(path, encoding="utf-8", xml_declaration=True)


def _write_omm_csv(path: Path, records: list[dict]) -> None:
    with path.open("w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(records[0]))
        writer.writeheader()
        writer.writerows(records)


@pytest.mark.parametrize("suffix, write", [(".xml", _write_omm_xml), (".csv", _write_omm_csv)])
def test_omm_files_load_to_the_same_elements(tmp_path, suffix, write):
    recs, refs = _omm_records()
    write(tmp_path / f"sets{suffix}", recs)
    scen = _scenario(tmp_path, [{"kind": "omm", "path": f"sets{suffix}"}])
    got = scen.constellation.satellites
    assert [s.name for s in got] == [r["OBJECT_NAME"] for r in recs]
    for sat, ref in zip(got, refs):
        assert sat.satrec.satnum == ref.satnum
        # tolerance: degree <-> radian and rev/day <-> rad/min conversions, a few ulp
        for key in ELEMENTS:
            assert getattr(sat.satrec, key) == pytest.approx(getattr(ref, key), rel=1e-12,
                                                             abs=1e-300), key
        # epoch: the writer prints microseconds (truncated) and sgp4 counts days since 1949
        # in one float (4e-12 days): within 2 us
        d_days = ((sat.satrec.jdsatepoch - ref.jdsatepoch)
                  + (sat.satrec.jdsatepochF - ref.jdsatepochF))
        assert abs(d_days) * 86400.0 < 2e-6


@pytest.mark.parametrize("suffix", [".xml", ".csv"])
def test_omm_missing_field_names_record_and_field(tmp_path, suffix):
    recs, _ = _omm_records()
    path = tmp_path / f"gap{suffix}"
    if suffix == ".csv":
        recs[1]["MEAN_MOTION"] = ""          # record 2 without a mean motion
        _write_omm_csv(path, recs)
        where, key = "record 2", "MEAN_MOTION"
    else:
        del recs[2]["BSTAR"]                  # record 3 without a drag term
        _write_omm_xml(path, recs)
        where, key = "record 3", "BSTAR"
    with pytest.raises(InputError) as info:
        _scenario(tmp_path, [{"kind": "omm", "path": path.name}])
    msg = str(info.value)
    assert str(path) in msg and where in msg and key in msg, msg


# ---- stochastic sources -------------------------------------------------------------------------

ISO = {"kind": "isotropic", "satellites": 50, "altitude_km": 800.0}
PLANES = {"kind": "random-planes", "planes": 6, "per_plane": 5, "altitude_km": 1000.0}


@pytest.mark.parametrize("table", [ISO, PLANES, {**PLANES, "spacing": "random"},
                                   {**PLANES, "inclination_deg": 70.0}])
def test_stochastic_sources_reproducible_per_seed(tmp_path, table):
    # the table's own seed (the scenario-seed fallback is tested below)
    a = _elements(_scenario(tmp_path, [{**table, "seed": 11}]))
    b = _elements(_scenario(tmp_path, [{**table, "seed": 11}]))
    c = _elements(_scenario(tmp_path, [{**table, "seed": 12}]))
    assert np.array_equal(a, b)                      # same seed: bit-identical elements
    assert not np.allclose(a[:, 1:], c[:, 1:])       # another seed: other RAANs and phases
    if "inclination_deg" in table:
        np.testing.assert_allclose(np.degrees(a[:, 0]), table["inclination_deg"], atol=1e-12)


def test_random_planes_equal_spacing(tmp_path):
    # "equal" spacing: S satellites 360/S apart in each plane (the source's documented rule)
    el = _elements(_scenario(tmp_path, [{**PLANES, "seed": 3}]))
    u = np.degrees(el[:, 2] + el[:, 3]).reshape(6, 5)
    gaps = np.diff(np.sort(u % 360.0, axis=1), axis=1)
    np.testing.assert_allclose(gaps, 72.0, atol=1e-9)   # float rounding only


def test_isotropic_plane_normals_uniform_on_sphere(tmp_path):
    el = _elements(_scenario(tmp_path, [{**ISO, "satellites": 2000, "seed": 2027}]))
    # A plane normal uniform on the sphere has cos(inclination) uniform on [-1, 1]
    # (Archimedes' hat-box theorem) and its azimuth, hence the RAAN, uniform on [0, 2 pi);
    # the phase along the orbit is uniform too.  Kolmogorov-Smirnov tests at alpha = 0.01
    # (scipy.stats.kstest); the seed is fixed, so the outcome is deterministic.
    alpha = 0.01
    assert kstest(np.cos(el[:, 0]), "uniform", args=(-1.0, 2.0)).pvalue > alpha
    assert kstest(el[:, 1], "uniform", args=(0.0, 2 * math.pi)).pvalue > alpha
    assert kstest((el[:, 2] + el[:, 3]) % (2 * math.pi), "uniform",
                  args=(0.0, 2 * math.pi)).pvalue > alpha
    # power check: the same test rejects inclinations uniform in angle (not area)
    assert kstest(np.cos(np.linspace(0.0, math.pi, 2000)), "uniform",
                  args=(-1.0, 2.0)).pvalue < alpha


def test_stochastic_source_falls_back_to_scenario_seed(tmp_path):
    a = _elements(_scenario(tmp_path, [ISO], seed=5))
    b = _elements(_scenario(tmp_path, [ISO], seed=5))
    c = _elements(_scenario(tmp_path, [ISO], seed=6))
    assert np.array_equal(a, b) and not np.allclose(a[:, 1:], c[:, 1:])


def test_two_stochastic_tables_with_one_seed_are_independent(tmp_path):
    # documented in dwell.constellations.stochastic: the table index keeps them independent
    el = _elements(_scenario(tmp_path, [{**ISO, "seed": 5}, {**ISO, "seed": 5}]))
    assert not np.allclose(el[:50, 1:], el[50:, 1:])


def test_tle_epoch_spread_warns(tmp_path):
    sets = _vallado_sets()
    path = tmp_path / "spread.tle"   # epochs 2000-06-27 and 2006-06-25: six years apart
    path.write_text("".join(f"{sets[n][0]}\n{sets[n][1]}\n" for n in ("00005", "06251")))
    warnings: list[str] = []
    _scenario(tmp_path, [{"kind": "tle", "path": "spread.tle"}], warn=warnings.append)
    assert len(warnings) == 1 and str(path) in warnings[0]


# ---- scenario errors ----------------------------------------------------------------------------

def _valid() -> dict:
    return {"scenario": {"start": START, "duration_s": 600.0},
            "constellation": [{"kind": "walker-delta", "satellites": 12, "planes": 3,
                               "phasing": 1, "altitude_km": 550.0, "inclination_deg": 53.0},
                              {"kind": "walker-delta", "satellites": 8, "planes": 2,
                               "altitude_km": 1200.0, "inclination_deg": 87.9}],
            "terminal": [dict(TERMINAL)]}


def _set(path: tuple, value):
    def edit(raw):
        node = raw
        for key in path[:-1]:
            node = node[key]
        node[path[-1]] = value
    return edit


@pytest.mark.parametrize("edit, where, shown", [
    (_set(("terminal", 0, "colour"), "red"), "terminal[1].colour", "'red'"),
    (_set(("constellation", 1, "altitude_km"), -5), "constellation[2].altitude_km", "-5"),
    (_set(("constellation", 0, "inclination_deg"), 200), "constellation[1].inclination_deg",
     "200"),
    (_set(("constellation", 0, "phasing"), 3), "constellation[1].phasing", "3"),
    (_set(("constellation", 0, "satellites"), 10), "constellation[1].satellites", "10"),
    (_set(("scenario", "duration_s"), 0), "scenario.duration_s", "0"),
    (_set(("scenario", "duration_s"), -60.0), "scenario.duration_s", "-60.0"),
    (_set(("scenario", "start"), "2027-05-10T00:00:00"), "scenario.start",
     "'2027-05-10T00:00:00'"),
])
def test_config_errors_name_file_key_and_value(tmp_path, edit, where, shown):
    raw = _valid()
    scenario_from_dict(raw, "bad.toml", tmp_path)      # the unedited scenario is valid
    raw = _valid()
    edit(raw)
    with pytest.raises(InputError) as info:
        scenario_from_dict(raw, "bad.toml", tmp_path)
    msg = str(info.value)
    # one line "file: key = value: reason" (the InputError contract in dwell.errors)
    assert msg.startswith("bad.toml: ") and "\n" not in msg, msg
    assert f"{where} = {shown}" in msg, msg


BAD_TOML = """\
[scenario]
start = "2027-05-10T00:00:00Z"
duration_s = 600

[[constellation]]
kind = "walker-delta"
satellites = 12
planes = 3
altitude_km = -5
inclination_deg = 53

[[terminal]]
name = "t1"
lat_deg = 45
lon_deg = 7
"""


def test_cli_bad_config_exits_2_with_one_line_and_no_output(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(BAD_TOML)
    out = tmp_path / "out.parquet"
    result = CliRunner().invoke(main, ["passes", str(bad), "-o", str(out)])
    assert result.exit_code == 2, result.output
    lines = [ln for ln in result.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, result.stderr
    assert str(bad) in lines[0] and "constellation[1].altitude_km = -5" in lines[0]
    assert result.stdout == ""
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml"]   # no temporary left
