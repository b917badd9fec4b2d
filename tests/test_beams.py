"""Multi-beam satellites and cells against outside sources.

- 3 dB beamwidths of the TR 38.811 section 6.4.1 pattern against the values TR 38.821 tabulates
  (Table 6.1.1.1-1, Set-1 satellite parameters: 4.4127 deg S-band, 1.7647 deg Ka-band; from
  memory) for the apertures that give them (2 m at 2 GHz, 0.5 m at 20 GHz);
- the hexagonal layout: centred hexagonal numbers 1 + 3R(R+1) (the beam counts of the 7- and
  19-beam layouts of the 3GPP NTN studies), neighbour spacing sin(spacing) in (u, v) (the frame
  contract), lattice distances of a hexagonal lattice (1, sqrt(3), 2 spacings), reuse clusters
  with co-channel distance sqrt(N) spacings (Rappaport, Wireless Communications, 2nd ed.,
  section 3.2: D = R sqrt(3N));
- nearest-beam lookup against brute force;
- SINR equals SNR with one satellite and no co-channel beam; two co-channel cells give the
  hand-computed S / (N + I);
- the beam-change rate of a standing terminal under earth-moving beams against the lattice
  crossing rate from the Cauchy-Crofton formula (Santalo, Integral Geometry and Geometric
  Probability, 1976).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from dwell.io.config import scenario_from_dict
from dwell.io.errors import InputError
from dwell.radio import beams as bm
from dwell.radio import interference
from dwell.radio.beams import BeamLayout

START = "2027-05-10T00:00:00Z"


def layout(**kw) -> BeamLayout:
    p = {"layout": "hex", "rings": 2, "spacing_deg": 4.4, "aperture_m": 2.0, "max_gain_dbi": 30.0,
         "reuse": 1, "load": 1.0, "cell_mode": "earth-moving", "cell_spacing_km": None,
         "cell_min_elevation_deg": 25.0, "cell_origin_lat_deg": None, "cell_origin_lon_deg": None}
    p.update(kw)
    return BeamLayout.from_params(p)


# ---- beamwidths -------------------------------------------------------------------------------

@pytest.mark.parametrize("aperture_m, f_ghz, tabulated_deg", [(2.0, 2.0, 4.4127),
                                                             (0.5, 20.0, 1.7647)])
def test_3db_beamwidth_matches_tr38821(aperture_m, f_ghz, tabulated_deg):
    # TR 38.821 Table 6.1.1.1-1 (from memory) quotes the 3 dB beamwidths to 4 decimals: the
    # tolerance is that rounding
    assert bm.beamwidth_3db_deg(aperture_m, f_ghz) == pytest.approx(tabulated_deg, abs=5e-5)


def test_default_spacing_is_the_3db_width():
    # common practice: neighbouring spot beams cross near their -3 dB contour
    p = bm.check_table({"layout": "hex"}, {"sat_aperture_m": 2.0, "sat_max_gain_dbi": 30.0,
                                          "frequency_ghz": 2.0}, "t.toml", "constellation[1]")
    assert p["spacing_deg"] == pytest.approx(4.4127, abs=5e-5)


# ---- the layout -------------------------------------------------------------------------------

@pytest.mark.parametrize("rings, beams", [(0, 1), (1, 7), (2, 19), (3, 37), (4, 61)])
def test_beam_count_is_the_centred_hexagonal_number(rings, beams):
    # centred hexagonal numbers 1 + 3R(R+1): 7 and 19 are the NTN studies' layouts
    lay = layout(rings=rings)
    q, r = lay.axial()
    assert lay.n_beams == beams == q.size
    assert len(set(zip(q.tolist(), r.tolist()))) == beams
    assert np.all(bm.hex_distance(q, r) <= rings)


def test_frame_contract_nadir_beam_axis_and_spacing():
    spacing = 4.4
    lay = layout(rings=3, spacing_deg=spacing)
    b = lay.boresight_uvw(*lay.axial())
    # beam 0 points at nadir (z of the satellite frame)
    assert np.allclose(b[0], [0.0, 0.0, 1.0])
    # ring 1 starts on +x: (u, v) = (sin spacing, 0), and is spacing_deg from nadir
    assert np.allclose(b[1], [math.sin(math.radians(spacing)), 0.0,
                              math.cos(math.radians(spacing))])
    ang = np.degrees(np.arccos(np.clip(b[1:7] @ b[0], -1, 1)))
    assert np.allclose(ang, spacing, atol=1e-9)
    # hexagonal lattice: 6 neighbours at d, then 6 at sqrt(3) d and 6 at 2 d (ring 2), in (u, v)
    d = math.sin(math.radians(spacing))
    uv = b[:, :2]
    dist = np.sort(np.linalg.norm(uv[1:19] - uv[0], axis=1) / d)
    assert np.allclose(dist[:6], 1.0) and np.allclose(dist[6:12], math.sqrt(3.0))
    assert np.allclose(dist[12:18], 2.0)


@pytest.mark.parametrize("reuse", [3, 4, 7])
def test_reuse_clusters(reuse):
    # Rappaport section 3.2: a cluster of N cells repeats with co-channel distance
    # D = R sqrt(3N), R the cell radius (= spacing / sqrt 3 for hexagons), i.e. sqrt(N) spacings;
    # a cell's six neighbours never share its colour
    span = np.arange(-6, 7)
    q, r = (a.ravel() for a in np.meshgrid(span, span, indexing="ij"))
    col = bm.reuse_colour(q, r, reuse)
    assert set(col.tolist()) == set(range(reuse))
    x, y = bm.lattice_xy(q, r, 1.0)
    origin = (q == 0) & (r == 0)
    same = (col == col[origin][0]) & ~origin
    assert np.min(np.hypot(x[same], y[same])) == pytest.approx(math.sqrt(reuse))
    for dq, dr in ((1, 0), (0, 1), (-1, 1), (-1, 0), (0, -1), (1, -1)):
        assert np.all(bm.reuse_colour(q + dq, r + dr, reuse) != col)


def test_nearest_lattice_point_against_brute_force():
    # brute force: the closest of all lattice points within a window (independent of rounding)
    rng = np.random.default_rng(3)
    x, y = rng.uniform(-5, 5, 2000), rng.uniform(-5, 5, 2000)
    q, r = bm.nearest_axial(x, y, 0.7)
    span = np.arange(-12, 13)
    qq, rr = (a.ravel() for a in np.meshgrid(span, span, indexing="ij"))
    lx, ly = bm.lattice_xy(qq, rr, 0.7)
    d2 = (x[:, None] - lx[None, :]) ** 2 + (y[:, None] - ly[None, :]) ** 2
    best = np.argmin(d2, axis=1)
    mine = np.hypot(x - bm.lattice_xy(q, r, 0.7)[0], y - bm.lattice_xy(q, r, 0.7)[1])
    # equal distance (ties on a Voronoi edge may pick either point)
    assert np.allclose(mine, np.sqrt(d2[np.arange(x.size), best]), atol=1e-12)


# ---- interference -----------------------------------------------------------------------------

def test_two_cochannel_cells_hand_computed():
    # S / (N + I): two cells of one colour at one instant, SNRs 10 dB and 7 dB, load 0.5; a third
    # cell on another colour does not interfere.  Hand: 10 / (1 + 0.5 * 5.0119) = 2.8523 ->
    # 4.5520 dB; 5.0119 / (1 + 0.5 * 10) = 0.83531 -> -0.78151 dB
    snr = np.array([10.0, 7.0, 3.0])
    got = interference.sinr_db(snr, np.zeros(3, int), np.array([0, 0, 1]), np.full(3, 0.5), 1)
    assert got[0] == pytest.approx(10 * math.log10(10 / (1 + 0.5 * 10 ** 0.7)), abs=1e-12)
    assert got[0] == pytest.approx(4.5520, abs=1e-4)
    assert got[1] == pytest.approx(-0.78151, abs=1e-4)
    assert got[2] == pytest.approx(3.0, abs=1e-12)


def _scenario(constellation: dict, terminals: list[dict], link: dict | None = None,
              duration_s: float = 3600.0, **scen):
    raw = {"scenario": {"start": START, "duration_s": duration_s, **scen},
           "constellation": [constellation], "terminal": terminals,
           "link": {"interference": True, **(link or {})},
           "policy": [{"name": "he", "rule": "highest-elevation"}]}
    return scenario_from_dict(raw, "t.toml", Path("."))


def _all_rows(scen):
    from dwell.orbits.geometry import Geometry
    from dwell.radio.measure import MeasurementStream
    geo = Geometry(scen)
    stream = MeasurementStream(geo, 0, scen.link, float(scen.scenario["measurement_period_s"]),
                               scen.seed)
    return stream.rows(0, stream.K)


def test_sinr_equals_snr_without_cochannel_cells():
    # one satellite, one beam: nothing interferes, so SINR = SNR (float rounding only)
    one = {"kind": "walker-delta", "name": "solo", "satellites": 1, "planes": 1, "phasing": 0,
           "altitude_km": 600.0, "inclination_deg": 90.0}
    rows = _all_rows(_scenario(one, [{"name": "pole", "lat_deg": 89.0, "lon_deg": 0.0,
                                      "min_elevation_deg": 10.0}], duration_s=6000.0))
    m = rows.sat >= 0
    assert m.sum() > 100
    assert np.allclose(rows.sinr_db[m], rows.snr_db[m], atol=1e-9, rtol=0)
    # seven beams of seven colours (reuse 7, one ring): no beam of the satellite is co-channel
    # with another within the candidate set, so every cell's SINR is its SNR
    seven = {**one, "beams": {"layout": "hex", "rings": 1, "reuse": 7, "aperture_m": 0.6,
                              "max_gain_dbi": 20.0}}
    rows = _all_rows(_scenario(seven, [{"name": "pole", "lat_deg": 89.0, "lon_deg": 0.0,
                                        "min_elevation_deg": 10.0}], duration_s=6000.0))
    m = rows.sat >= 0
    assert m.sum() > 100 and len(set(rows.beam[m].tolist())) > 1
    assert np.allclose(rows.sinr_db[m], rows.snr_db[m], atol=1e-9, rtol=0)


def test_sinr_of_cochannel_satellites_is_s_over_n_plus_i():
    # single-beam satellites on one frequency (reuse 1), several in view from a pole (one polar
    # plane of 30, 12 deg apart; a 600 km shell's horizon cap is 24 deg wide): each one's SINR is
    # its SNR over (1 + the others' SNRs), linear, at every instant
    plane = {"kind": "walker-delta", "name": "ring", "satellites": 30, "planes": 1,
             "phasing": 0, "altitude_km": 600.0, "inclination_deg": 90.0}
    rows = _all_rows(_scenario(plane, [{"name": "pole", "lat_deg": 90.0, "lon_deg": 0.0,
                                        "min_elevation_deg": 0.0}], duration_s=1200.0))
    m = rows.sat >= 0
    assert ((m.sum(axis=1)) >= 2).sum() > 100
    s = np.where(m, 10 ** (np.where(m, rows.snr_db, 0.0) / 10), 0.0)
    others = s.sum(axis=1, keepdims=True) - s
    expect = 10 * np.log10(np.where(m, s, 1.0) / (1 + others))
    assert np.allclose(rows.sinr_db[m], expect[m], atol=1e-9)
    assert np.any(rows.sinr_db[m] < rows.snr_db[m] - 1.0)     # interference really counts


# ---- bad input --------------------------------------------------------------------------------

LINK = {"sat_aperture_m": 2.0, "sat_max_gain_dbi": 30.0, "frequency_ghz": 2.0}


@pytest.mark.parametrize("beams, key", [
    ({"layout": "grid"}, "beams.layout"),
    ({"layout": "hex", "cell_mode": "sideways"}, "beams.cell_mode"),
    ({"layout": "hex", "rings": -1}, "beams.rings"),
    ({"layout": "hex", "rings": 21}, "beams.rings"),
    ({"layout": "hex", "reuse": 2}, "beams.reuse"),
    ({"layout": "hex", "cell_mode": "earth-fixed", "cell_spacing_km": 0}, "beams.cell_spacing_km"),
    ({"layout": "hex", "cell_mode": "earth-fixed"}, "beams.cell_spacing_km"),
    ({"layout": "hex", "load": 1.5}, "beams.load"),
    ({"layout": "single", "cell_mode": "earth-fixed"}, "beams.cell_mode"),
])
def test_bad_beam_tables_name_file_key_and_value(beams, key):
    with pytest.raises(InputError) as err:
        bm.check_table(beams, LINK, "t.toml", "constellation[1]")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("t.toml: constellation[1].") and key in msg


def test_more_than_twenty_rings_says_why():
    with pytest.raises(InputError, match="at most 20 rings"):
        bm.check_table({"layout": "hex", "rings": 25}, LINK, "t.toml", "constellation[1]")


def test_spacing_wider_than_the_earth_disc_is_refused():
    # from 600 km the Earth's disc has a half-angle of asin(6371 / 6971) = 66.1 deg
    shell = {"kind": "walker-delta", "name": "wide", "satellites": 10, "planes": 1, "phasing": 0,
             "altitude_km": 600.0, "inclination_deg": 53.0,
             "beams": {"layout": "hex", "spacing_deg": 70.0}}
    with pytest.raises(InputError, match="Earth disc") as err:
        _scenario(shell, [{"name": "a", "lat_deg": 0.0, "lon_deg": 0.0}])
    assert "constellation[1].beams.spacing_deg = 70.0" in str(err.value)
