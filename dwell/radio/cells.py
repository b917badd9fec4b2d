"""Cells: the identities a terminal measures and is served by, and which cells it can see.

A cell is a beam (earth-moving beams: satellite and beam number; the single-beam layout is beam
0 of each satellite) or a fixed ground hexagon (earth-fixed, quasi-Earth-fixed cells: served by
a beam that one satellite at a time steers at the cell's centre).  Cells carry an integer id
(:func:`moving_cell_id`, :func:`ground_cell_id`), a reference location on the ground (the beam
centre's ground point, moving with the satellite; or the cell centre) for distance conditions,
and a reuse colour (beams of one colour share a frequency).

:func:`expand_moving` turns (satellite, instant) samples into the beams around the terminal's
direction; :class:`GroundCells` holds the earth-fixed lattices of a run: which cells lie near
each terminal, which satellite serves each cell when (a schedule the network knows in
advance), and where each centre is.  Costs: O(1) per sample and beam (19 lattice candidates,
no search over the layout).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..orbits.frames import MEAN_EARTH_RADIUS_KM, geodetic_to_ecef_km
from ..radio.link import C_KM_S
from . import beams as bm

BEAM_STRIDE = 4096                   # > the most beams a layout can have (1261)
GROUND_BASE = 1 << 62                # earth-fixed cell ids start here
_AX = 1 << 15                        # axial offset (cells within +-2^15 lattice steps)
_SAT_SHIFT, _TABLE_SHIFT = 32, 52    # ground ids: table | serving satellite | q | r
_SAT_MASK = (1 << 20) - 1            # up to 2^20 satellites


def moving_cell_id(sat: np.ndarray, beam: np.ndarray) -> np.ndarray:
    """Id of beam ``beam`` of satellite ``sat`` (earth-moving or single-beam layouts)."""
    return np.asarray(sat, dtype=np.int64) * BEAM_STRIDE + np.asarray(beam, dtype=np.int64)


def ground_cell_id(table: int, q: np.ndarray, r: np.ndarray, sat: np.ndarray) -> np.ndarray:
    """Id of earth-fixed cell (q, r) of constellation table ``table`` as served by satellite
    ``sat``: a cell served by another satellite (after a switch) is another cell for the
    terminal, with the same ground cell (:func:`ground_key`)."""
    return (GROUND_BASE + (np.int64(table) << _TABLE_SHIFT)
            + ((np.asarray(sat, np.int64) & _SAT_MASK) << _SAT_SHIFT)
            + ((np.asarray(q, np.int64) + _AX) << 16) + (np.asarray(r, np.int64) + _AX))


def ground_key(cell: np.ndarray) -> np.ndarray:
    """The ground cell of earth-fixed cell ids (the serving satellite cleared); other ids are
    returned unchanged."""
    cell = np.asarray(cell, dtype=np.int64)
    return np.where(cell >= GROUND_BASE, cell & ~np.int64(_SAT_MASK << _SAT_SHIFT), cell)


def is_ground(cell: np.ndarray) -> np.ndarray:
    return np.asarray(cell, dtype=np.int64) >= GROUND_BASE


def decode_ground(cell: int) -> tuple[int, int, int]:
    """(table, q, r) of an earth-fixed cell id."""
    c = int(cell) - GROUND_BASE
    return c >> _TABLE_SHIFT, ((c >> 16) & 0xFFFF) - _AX, (c & 0xFFFF) - _AX


def cell_names(cells: np.ndarray, sat_names: list[str], table_names: list[str]) -> np.ndarray:
    """Readable names: ``SATELLITE/bN`` for beams, ``TABLE/c+Q+R`` for ground cells (the same
    name whichever satellite serves it), '' for -1."""
    cells = np.asarray(cells, dtype=np.int64)
    out = np.full(cells.shape, "", dtype=object)
    uniq, inv = np.unique(cells, return_inverse=True)
    names = []
    for c in uniq.tolist():
        if c < 0:
            names.append("")
        elif c >= GROUND_BASE:
            t, q, r = decode_ground(c)
            names.append(f"{table_names[t]}/c{q:+d}{r:+d}")
        else:
            names.append(f"{sat_names[c // BEAM_STRIDE]}/b{c % BEAM_STRIDE}")
    if uniq.size:
        out = np.asarray(names, dtype=object)[inv].reshape(cells.shape)
    return out


def beam_gain_dbi(sin_off: np.ndarray, aperture_m: float, frequency_ghz: float,
                  max_gain_dbi: float) -> np.ndarray:
    """TR 38.811 section 6.4.1 pattern from the sine of the off-boresight angle (the form the
    pattern is written in: ``G_max 4 |J1(k a sin t) / (k a sin t)|^2``)."""
    from scipy.special import j1

    k_per_m = 2.0 * np.pi * frequency_ghz * 1e9 / (C_KM_S * 1e3)
    x = k_per_m * 0.5 * aperture_m * np.asarray(sin_off, dtype=float)
    small = x < 1e-6
    xs = np.where(small, 1.0, x)
    ratio = np.where(small, 1.0, 2.0 * j1(xs) / xs)
    return max_gain_dbi + 10.0 * np.log10(np.maximum(ratio * ratio, np.finfo(float).tiny))


@dataclass
class CellSamples:
    """Cells around the terminal for a batch of (satellite, instant) samples ("pairs")."""

    pair: np.ndarray       # index of the sample each cell belongs to
    cell: np.ndarray       # cell id
    beam: np.ndarray       # beam number (-1 for ground cells)
    colour: np.ndarray     # reuse colour
    gain_dbi: np.ndarray   # the cell's beam gain towards the terminal
    max_gain_dbi: np.ndarray
    load: np.ndarray       # the beam's load (interference weight)
    measured: np.ndarray   # bool: close enough to be measured (else it only interferes)
    ref_km: np.ndarray     # terminal to the cell's reference location (NaN: none)
    until_s: np.ndarray    # when this satellite stops serving the cell (NaN: with its window)

    @classmethod
    def empty(cls) -> "CellSamples":
        z, zi = np.zeros(0), np.zeros(0, dtype=np.int64)
        return cls(zi, zi, zi, zi, z, z, z, np.zeros(0, bool), z, z)

    @classmethod
    def concat(cls, parts: list["CellSamples"]) -> "CellSamples":
        parts = [p for p in parts if p.pair.size] or [cls.empty()]
        return cls(*(np.concatenate([getattr(p, f) for p in parts])
                     for f in cls.__dataclass_fields__))


def expand_single(pair: np.ndarray, sat: np.ndarray, off_nadir_deg: np.ndarray,
                  nadir_km: np.ndarray, layout: bm.BeamLayout, frequency_ghz: float,
                  pointing: str) -> CellSamples:
    """One nadir beam per satellite (beam 0): today's single-cell satellites.  With
    ``pointing = "terminal"`` the beam is steered at the terminal (full gain)."""
    from ..radio.link import satellite_gain_dbi

    theta = np.zeros_like(off_nadir_deg) if pointing == "terminal" else off_nadir_deg
    gain = satellite_gain_dbi(theta, layout.aperture_m, frequency_ghz, layout.max_gain_dbi)
    n = pair.size
    return CellSamples(pair, moving_cell_id(sat, 0), np.zeros(n, np.int64),
                       np.zeros(n, np.int64), gain, np.full(n, layout.max_gain_dbi),
                       np.full(n, layout.load), np.ones(n, bool), nadir_km, np.full(n, np.nan))


def expand_moving(pair: np.ndarray, sat: np.ndarray, r_sat: np.ndarray, v_sat: np.ndarray,
                  site_r: np.ndarray, layout: bm.BeamLayout, frequency_ghz: float) -> CellSamples:
    """Earth-moving hex beams around the terminal's direction, for each sample.

    The terminal's direction (u, v) in the satellite frame is rounded to its nearest lattice
    point; the lattice points around it that are beams of the layout are the candidates
    (:attr:`dwell.radio.beams.BeamLayout.candidate_offsets`: their gains are the only
    non-negligible ones).  Those within ``MEASURE_RADIUS_SPACINGS`` of (u, v) are
    measured; all of them interfere on their colour.
    """
    frame = bm.satellite_frame(r_sat, v_sat)
    uvw = bm.direction_cosines(frame, r_sat, site_r)
    d = layout.spacing_uv
    q0, r0 = bm.nearest_axial(uvw[:, 0], uvw[:, 1], d)
    nq, nr = layout.candidate_offsets
    q = q0[:, None] + nq[None, :]
    r = r0[:, None] + nr[None, :]
    beam = layout.beam_index(q, r)
    ok = beam >= 0
    pi, ji = np.nonzero(ok)
    if pi.size == 0:
        return CellSamples.empty()
    qq, rr = q[pi, ji], r[pi, ji]
    b = layout.boresight_uvw(qq, rr)                               # (M, 3)
    dirn = uvw[pi]
    cos_off = np.clip(np.einsum("ij,ij->i", b, dirn), -1.0, 1.0)
    sin_off = np.sqrt(np.maximum(0.0, 1.0 - cos_off * cos_off))
    gain = beam_gain_dbi(sin_off, layout.aperture_m, frequency_ghz, layout.max_gain_dbi)
    du, dv = dirn[:, 0] - b[:, 0], dirn[:, 1] - b[:, 1]
    measured = du * du + dv * dv <= (bm.MEASURE_RADIUS_SPACINGS * d) ** 2
    # the satellite covers the terminal while its direction lies in a beam's cell (its nearest
    # lattice point is a beam); beyond the layout's edge its beams only interfere
    covered = layout.beam_index(q0, r0) >= 0
    measured &= covered[pi]
    ref = np.full(pi.size, np.nan)
    if measured.any():
        m = np.flatnonzero(measured)
        # the beam centre's ground point: its boresight ray meets the sphere through the
        # terminal (so the distance is measured at the terminal's own radius)
        bt = np.einsum("mji,mj->mi", frame[pi[m]], b[m])           # boresight in TEME
        rs = r_sat[pi[m]]
        site = site_r[pi[m]]
        radius = np.linalg.norm(site, axis=1)
        rb = np.einsum("ij,ij->i", rs, bt)
        disc = rb * rb - (np.einsum("ij,ij->i", rs, rs) - radius * radius)
        hit = disc >= 0
        tt = -rb - np.sqrt(np.where(hit, disc, 0.0))
        g = rs + tt[:, None] * bt
        cosg = np.einsum("ij,ij->i", g, site) / (np.linalg.norm(g, axis=1) * radius)
        ref[m] = np.where(hit, np.arccos(np.clip(cosg, -1.0, 1.0)) * MEAN_EARTH_RADIUS_KM, np.nan)
    n = pi.size
    return CellSamples(pair[pi], moving_cell_id(sat[pi], beam[pi, ji]), beam[pi, ji],
                       layout.colour(qq, rr), gain, np.full(n, layout.max_gain_dbi),
                       np.full(n, layout.load), measured, ref, np.full(n, np.nan))


# ---- earth-fixed cells -------------------------------------------------------------------------

class GroundLattice:
    """A hexagonal lattice of cell centres, ``spacing_km`` apart, laid in the azimuthal
    equidistant projection about an origin on the mean sphere (6371 km).

    Distances and bearings from the origin are true, so cells near it are regular hexagons;
    far from it the lattice stretches across the bearing (by 1 % at 1,100 km, 11 % at
    5,000 km: ``rho / (R sin(rho / R))``), still tiling the ground without gaps.  One lattice
    axis points east at the origin.
    """

    def __init__(self, origin_lat_deg: float, origin_lon_deg: float, spacing_km: float):
        self.lat0 = math.radians(origin_lat_deg)
        self.lon0 = math.radians(origin_lon_deg)
        self.spacing_km = float(spacing_km)

    def to_plane(self, lat_deg: np.ndarray, lon_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(east, north) km of points in the projection."""
        lat, lon = np.radians(lat_deg), np.radians(lon_deg)
        dlon = lon - self.lon0
        c = np.sin(self.lat0) * np.sin(lat) + np.cos(self.lat0) * np.cos(lat) * np.cos(dlon)
        rho = np.arccos(np.clip(c, -1.0, 1.0)) * MEAN_EARTH_RADIUS_KM
        az = np.arctan2(np.sin(dlon) * np.cos(lat),
                        np.cos(self.lat0) * np.sin(lat) - np.sin(self.lat0) * np.cos(lat) * np.cos(dlon))
        return rho * np.sin(az), rho * np.cos(az)

    def from_plane(self, x_km: np.ndarray, y_km: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Latitude and longitude (deg) of projected points."""
        rho = np.hypot(x_km, y_km) / MEAN_EARTH_RADIUS_KM
        az = np.arctan2(x_km, y_km)
        lat = np.arcsin(np.clip(np.sin(self.lat0) * np.cos(rho)
                                + np.cos(self.lat0) * np.sin(rho) * np.cos(az), -1.0, 1.0))
        lon = self.lon0 + np.arctan2(np.sin(az) * np.sin(rho) * np.cos(self.lat0),
                                     np.cos(rho) - np.sin(self.lat0) * np.sin(lat))
        return np.degrees(lat), np.mod(np.degrees(lon) + 180.0, 360.0) - 180.0

    def cell_of(self, lat_deg: np.ndarray, lon_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x, y = self.to_plane(lat_deg, lon_deg)
        return bm.nearest_axial(x, y, self.spacing_km)

    def centre(self, q: np.ndarray, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x, y = bm.lattice_xy(q, r, self.spacing_km)
        return self.from_plane(x, y)


@dataclass
class CellSchedule:
    """Which satellite serves one ground cell when: intervals [start, end) and satellites."""

    start_s: np.ndarray
    end_s: np.ndarray
    sat: np.ndarray

    def server(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The serving satellite at each instant (-1: unserved) and when that service ends."""
        t_s = np.asarray(t_s, dtype=float)
        if self.start_s.size == 0:
            return np.full(t_s.shape, -1, dtype=np.int64), np.full(t_s.shape, np.nan)
        i = np.maximum(np.searchsorted(self.start_s, t_s, side="right") - 1, 0)
        ok = (self.start_s[i] <= t_s) & (t_s < self.end_s[i])
        return np.where(ok, self.sat[i], -1), np.where(ok, self.end_s[i], np.nan)

    def switches_between(self, a: float, b: float) -> np.ndarray:
        return self.start_s[(self.start_s > a) & (self.start_s < b)]


def schedule_from_windows(sat: np.ndarray, start_s: np.ndarray, end_s: np.ndarray,
                          duration_s: float) -> CellSchedule:
    """The serving chain of one cell from the windows in which satellites see its centre
    above the cell elevation floor: at any instant without a server, take the satellite in view
    whose window ends last (it serves longest: fewest switches, common practice for
    quasi-Earth-fixed cells), keep it until its window ends, and repeat.  O(W log W)."""
    order = np.argsort(start_s, kind="stable")
    sat, start_s, end_s = sat[order], start_s[order], end_s[order]
    out_a, out_b, out_s = [], [], []
    t = 0.0
    while t < duration_s:
        open_ = np.flatnonzero((start_s <= t) & (end_s > t))
        if open_.size == 0:
            later = np.flatnonzero(start_s > t)
            if later.size == 0:
                break
            t = float(start_s[later[0]])
            continue
        best = open_[np.lexsort((sat[open_], -end_s[open_]))[0]]
        out_a.append(t)
        out_b.append(float(end_s[best]))
        out_s.append(int(sat[best]))
        t = float(end_s[best])
    return CellSchedule(np.asarray(out_a), np.asarray(out_b), np.asarray(out_s, dtype=np.int64))


class GroundCells:
    """Earth-fixed cells of a run: lattices per table, the cells near each terminal, their
    centres (as extra pass-finding sites) and their serving schedules."""

    def __init__(self, scen, terminal_sites: list):
        from ..obstruction.motion import Static
        from ..obstruction.site import Site

        self.duration_s = float(scen.scenario["duration_s"])
        self.tables = [i for i, lay in enumerate(scen.layouts) if lay.earth_fixed]
        self.layouts = {i: scen.layouts[i] for i in self.tables}
        self.lattice = {i: GroundLattice(lay.cell_origin_lat_deg, lay.cell_origin_lon_deg,
                                         lay.cell_spacing_km) for i, lay in self.layouts.items()}
        sat_table = np.array([s.table for s in scen.constellation.satellites], dtype=np.int64)
        self.sat_table = sat_table
        keys: dict[tuple[int, int, int], int] = {}
        for site in terminal_sites:
            t = _path_samples(site, self.duration_s)
            lat, lon, _ = site.motion.geodetic(t)
            for ti in self.tables:
                q0, r0 = self.lattice[ti].cell_of(lat, lon)
                nq, nr = self.layouts[ti].candidate_offsets
                for a, b in set(zip(q0.tolist(), r0.tolist())):
                    for dq, dr in zip(nq.tolist(), nr.tolist()):
                        keys.setdefault((ti, a + dq, b + dr), len(keys))
        self.keys = sorted(keys)                       # (table, q, r), a fixed order
        self.index = {k: j for j, k in enumerate(self.keys)}
        self.sites = []
        self.centre_ecef = np.zeros((len(self.keys), 3))
        for j, (ti, q, r) in enumerate(self.keys):
            lat, lon = self.lattice[ti].centre(np.array([q]), np.array([r]))
            floor = self.layouts[ti].cell_min_elevation_deg
            self.sites.append(Site(f"cell{j}", -1 - j, floor, Static(float(lat[0]), float(lon[0]),
                                                                     0.0)))
            self.centre_ecef[j] = geodetic_to_ecef_km(float(lat[0]), float(lon[0]), 0.0)
        self.schedules: list[CellSchedule] | None = None

    @property
    def n_cells(self) -> int:
        return len(self.keys)

    def build_schedules(self, geo, first_site: int) -> None:
        """Serving schedules from the cell centres' windows (computed once, for the whole run)."""
        if self.schedules is not None:
            return
        geo.run_all()
        self.schedules = []
        for j, (ti, _, _) in enumerate(self.keys):
            w = geo.window_frame(first_site + j)
            sat = w["sat"].to_numpy(dtype=np.int64)
            own = self.sat_table[sat] == ti if sat.size else np.zeros(0, bool)
            self.schedules.append(schedule_from_windows(
                sat[own], w["start_s"].to_numpy()[own], w["end_s"].to_numpy()[own],
                self.duration_s))

    def near(self, table: int, lat_deg: np.ndarray, lon_deg: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """For each position: the cells around its own cell (two rings, three for reuse 7), as plan indices
        (-1 where the plan lacks a cell), their axial (q, r), and whether each is measured
        (centre within ``MEASURE_RADIUS_SPACINGS`` spacings of the position)."""
        lat_deg, lon_deg = np.atleast_1d(lat_deg), np.atleast_1d(lon_deg)
        lat_t = self.lattice[table]
        x, y = lat_t.to_plane(lat_deg, lon_deg)
        q0, r0 = bm.nearest_axial(x, y, lat_t.spacing_km)
        nq, nr = self.layouts[table].candidate_offsets
        q = q0[:, None] + nq[None, :]
        r = r0[:, None] + nr[None, :]
        idx = np.array([self.index.get((table, a, b), -1) for a, b in
                        zip(q.ravel().tolist(), r.ravel().tolist())], dtype=np.int64)
        cx, cy = bm.lattice_xy(q, r, lat_t.spacing_km)
        d2 = (cx - x[:, None]) ** 2 + (cy - y[:, None]) ** 2
        measured = d2 <= (bm.MEASURE_RADIUS_SPACINGS * lat_t.spacing_km) ** 2
        return idx.reshape(q.shape), q, r, measured


def _path_samples(site, duration_s: float) -> np.ndarray:
    """Instants at which to sample a terminal's position for the cells it passes."""
    if getattr(site.motion, "max_speed_m_s", 0.0) <= 0.0:
        return np.zeros(1)
    return np.append(np.arange(0.0, duration_s, 10.0), duration_s)


def expand_ground(pair: np.ndarray, sat: np.ndarray, k_row: np.ndarray, t_s: np.ndarray,
                  r_sat: np.ndarray, site_r: np.ndarray, near: dict, cells: GroundCells,
                  gmst: np.ndarray, frequency_ghz: float, site_lat_deg: np.ndarray,
                  site_lon_deg: np.ndarray) -> CellSamples:
    """Earth-fixed cells near the terminal that satellite ``sat`` serves at each sample.

    ``near[table]`` holds, per row of the block, the plan indices, axial coordinates and
    measured flags of the 19 cells around the terminal (see :meth:`GroundCells.near`);
    ``k_row`` is each sample's row within the block.  A cell's beam is steered at its centre,
    so its gain towards the terminal follows the angle at the satellite between the centre and
    the terminal.
    """
    from ..orbits.frames import ecef_to_teme

    parts = []
    for ti, (idx, q, r, measured) in near.items():
        own = cells.sat_table[sat] == ti
        if not own.any():
            continue
        p_own = np.flatnonzero(own)
        ci = idx[k_row[p_own]]                                      # (P', 19)
        served = np.full(ci.shape, -1, dtype=np.int64)
        until = np.full(ci.shape, np.nan)
        for c in np.unique(ci[ci >= 0]).tolist():
            m = ci == c
            rows_m = np.nonzero(m)[0]
            served[m], until[m] = cells.schedules[c].server(t_s[p_own[rows_m]])
        hit = served == sat[p_own][:, None]
        pi, ji = np.nonzero(hit)
        if pi.size == 0:
            continue
        pp = p_own[pi]
        c = ci[pi, ji]
        centre = ecef_to_teme(cells.centre_ecef[c], gmst[pp])
        to_c = centre - r_sat[pp]
        to_s = site_r[pp] - r_sat[pp]
        cos_off = np.einsum("ij,ij->i", to_c, to_s) / (np.linalg.norm(to_c, axis=1) *
                                                        np.linalg.norm(to_s, axis=1))
        sin_off = np.sqrt(np.maximum(0.0, 1.0 - np.clip(cos_off, -1.0, 1.0) ** 2))
        lay = cells.layouts[ti]
        gain = beam_gain_dbi(sin_off, lay.aperture_m, frequency_ghz, lay.max_gain_dbi)
        qq, rr = q[k_row[pp], ji], r[k_row[pp], ji]
        lat_c, lon_c = cells.lattice[ti].centre(qq, rr)
        ref = _great_circle_km(site_lat_deg[k_row[pp]], site_lon_deg[k_row[pp]], lat_c, lon_c)
        n = pp.size
        parts.append(CellSamples(pair[pp], ground_cell_id(ti, qq, rr, sat[pp]),
                                 np.full(n, -1, np.int64), lay.colour(qq, rr), gain,
                                 np.full(n, lay.max_gain_dbi), np.full(n, lay.load),
                                 measured[k_row[pp], ji], ref, until[pi, ji]))
    return CellSamples.concat(parts)


def _great_circle_km(lat1, lon1, lat2, lon2) -> np.ndarray:
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    c = np.sin(p1) * np.sin(p2) + np.cos(p1) * np.cos(p2) * np.cos(dl)
    return np.arccos(np.clip(c, -1.0, 1.0)) * MEAN_EARTH_RADIUS_KM


__all__ = ["BEAM_STRIDE", "CellSamples", "GroundCells", "GroundLattice", "cell_names",
           "expand_ground", "expand_moving", "expand_single", "ground_cell_id", "ground_key",
           "moving_cell_id"]
