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


# ---- beam changes under earth-moving beams: Cauchy-Crofton ------------------------------------

def _crossings_per_length(spacing: float, heading: np.ndarray) -> np.ndarray:
    """Mean boundary crossings per unit length of a straight track through a hexagonal
    lattice tessellation (neighbour spacing ``spacing``) in direction ``heading`` from a lattice
    axis.  Cauchy-Crofton (Santalo 1976): a line in direction t crosses an edge family of
    direction p with length density L_A per unit area at rate L_A |sin(t - p)| per unit length.
    The Voronoi hexagons (side s = spacing / sqrt 3) have three edge families, perpendicular to
    the neighbour directions 0, 60 and 120 deg, each of density 2 / (3 sqrt(3) s)."""
    s = spacing / math.sqrt(3.0)
    dens = 2.0 / (3.0 * math.sqrt(3.0) * s)
    return sum(dens * np.abs(np.sin(heading - math.radians(p))) for p in (90.0, 150.0, 30.0))


def test_crossing_density_limits():
    # along a lattice axis 4 / (3 d); averaged over directions 4 / (pi d) = (2/pi) L_A with
    # L_A = 2 / d the edge length per unit area (Santalo's isotropic Cauchy-Crofton)
    d = 0.37
    assert _crossings_per_length(d, np.array([0.0]))[0] == pytest.approx(4 / (3 * d))
    th = np.linspace(0, 2 * np.pi, 20001)[:-1]
    assert _crossings_per_length(d, th).mean() == pytest.approx(4 / (math.pi * d), rel=1e-6)


@pytest.mark.slow
def test_beam_changes_follow_the_lattice_crossing_rate():
    # A standing terminal under earth-moving beams: its direction in the serving satellite's
    # frame moves through the (u, v) lattice of beams, and the strongest beam changes at every
    # boundary crossing.  Expected count = sum over the track of the Cauchy-Crofton density
    # times the (u, v) path length, averaged over track offsets (terminals spread evenly across
    # two lattice periods).  Counted where the satellite is within 10 deg of the terminal's nadir:
    # there the angular distance to a beam centre and the (u, v) distance agree within
    # 1 - cos 10 deg = 1.5 % (the flat-footprint region; further off, footprints stretch by
    # 1/cos of the off-nadir angle and the (u, v) lattice no longer says which beam is nearest).
    from dwell.kernel import run_scenario
    from dwell.orbits.frames import teme_to_ecef
    from dwell.orbits.geometry import Geometry

    spacing = 4.4
    plane = {"kind": "walker-delta", "name": "strip", "satellites": 12, "planes": 1,
             "phasing": 0, "altitude_km": 600.0, "inclination_deg": 90.0,
             "beams": {"layout": "hex", "rings": 8, "spacing_deg": spacing, "aperture_m": 2.0,
                       "max_gain_dbi": 30.0}}
    base = {"scenario": {"start": START, "duration_s": 7200.0, "earth_rotation": False},
            "constellation": [plane], "link": {"l3_filter_k": 0},
            "policy": [{"name": "ul", "rule": "until-lost"}]}
    probe = scenario_from_dict({**base, "terminal": [{"name": "x", "lat_deg": 0, "lon_deg": 0}]},
                               "t.toml", Path("."))
    geo = Geometry(probe)
    # the ground track's longitude at the equator (fixed: the Earth does not rotate)
    t = np.linspace(0, 5800, 5801)
    r, _ = geo.sky.states(np.zeros(t.size, int), t, velocity=False)
    k = int(np.argmin(np.abs(r[:, 2])))
    ecef = teme_to_ecef(r[k], geo.earth.gmst(np.array([t[k]]))[0])
    lon0 = math.degrees(math.atan2(ecef[1], ecef[0]))
    d_uv = math.sin(math.radians(spacing))
    # offsets stratified over two lattice periods across the track (six per period, so each
    # third of a period, where a track crosses one or two boundaries per spacing, gets its share)
    v0 = (np.arange(12) + 0.5) / 12 * 2 * (math.sqrt(3) / 2) * d_uv
    # cross-track ground distance giving that v at closest approach (flat, 600 km)
    dlon = np.degrees(600.0 * np.tan(np.arcsin(v0)) / 6378.137)
    terms = [{"name": f"t{j}", "lat_deg": 0.0, "lon_deg": float(lon0 + dl),
              "min_elevation_deg": 25.0} for j, dl in enumerate(dlon)]
    scen = scenario_from_dict({**base, "terminal": terms}, "t.toml", Path("."))
    results, geo = run_scenario(scen)
    counted = expected = 0.0
    for res in results:
        site = geo.sites[res.site_index]
        # one track per pass: consecutive links to one satellite (beam changes split them)
        spans: list[list] = []
        for sat, _, a, b, *_ in res.records.links:
            if spans and spans[-1][0] == sat and a - spans[-1][2] < 1.0:
                spans[-1][2] = b
            else:
                spans.append([sat, a, b])
        for sat, a, b in spans:
            ts = np.arange(a, b, 0.25)
            if ts.size < 2:
                continue
            rs, vs = geo.sky.states(np.full(ts.size, sat), ts)
            pos, _, _ = site.teme(ts, geo.earth)
            z = -rs / np.linalg.norm(rs, axis=1, keepdims=True)            # nadir
            x = vs - np.sum(vs * z, axis=1, keepdims=True) * z             # along-track
            x /= np.linalg.norm(x, axis=1, keepdims=True)
            y = np.cross(z, x)
            dvec = pos - rs
            dvec /= np.linalg.norm(dvec, axis=1, keepdims=True)
            u, v, w = (np.sum(dvec * e, axis=1) for e in (x, y, z))
            near = np.degrees(np.arccos(np.clip(w, -1, 1))) < 10.0
            du, dv = np.diff(u), np.diff(v)
            seg = near[1:] & near[:-1]
            heading = np.arctan2(dv, du)
            expected += float(np.sum((_crossings_per_length(d_uv, heading) *
                                      np.hypot(du, dv))[seg]))
            # the simulated beam changes of this pass inside the same region
            for h in res.records.handovers:
                if h[20] == "intra-satellite" and h[1] == sat and a < h[0] < b:
                    counted += bool(near[min(int(np.searchsorted(ts, h[0])), ts.size - 1)])
    assert expected > 300
    # tolerance: 1.5 % angular-vs-(u, v) distortion at 10 deg, each pass's count given its
    # offset uncertain by about one crossing (sd ~ sqrt(passes) / 2, ~1 % here), and the
    # 1 s measurement grid shifting crossings across the region's edge: 5 %
    assert counted == pytest.approx(expected, rel=0.05)
