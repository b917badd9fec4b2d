"""Populations: ``[[area]]`` tables that generate terminals over a region.

An area is a region and a way to fill it with terminals (the key names are a contract):

- region: a latitude/longitude box (``lat_min_deg``, ``lat_max_deg``, ``lon_min_deg``,
  ``lon_max_deg``) or a polygon (``polygon = [[lat_deg, lon_deg], ...]``, at least three
  vertices, edges straight in latitude and longitude, a ring that does not cross itself;
  longitudes may run past 180 to cross the antimeridian, e.g. 170 to 190);
- points: ``spacing_km`` (a grid, see :func:`grid_points`) or ``count`` (random points uniform in
  area on the sphere, see :func:`random_points`; ``seed`` as for other random parts: absent or
  ``"scenario"`` derives it from the scenario seed and the area's position, a whole number
  fixes it);
- weight per point (a population, used by the load tables and the weighted means): ``weight``
  (the same for every point, default 1) or ``density_per_km2`` (each point carries the density
  times the area it stands for: ``spacing_km**2`` on a grid, the area divided by ``count`` for
  random points, so the area's total weight is the density times its area);
- every ``[[terminal]]`` key but ``name``, ``lat_deg``, ``lon_deg`` and ``track`` (one track
  cannot be every point's path) as the template of each point: elevation floor, apertures,
  steering, horizon mask, ``[area.canyon]``, ``[area.los]``, ``[area.drive]``, ...  Random parts
  of the template (canyons, line of sight) draw per generated terminal, as for listed terminals:
  their seeds derive from the terminal's index in the scenario and the scenario seed, or, when
  the template's part sets a seed of its own, from that seed (points still differ from each
  other, and stay the same when the scenario seed changes).

Generated terminals are named ``<area name>-<index>`` (index from 1, zero-padded to at least
three digits), follow the listed ``[[terminal]]`` tables in the scenario (areas in file order,
points in generation order) and behave exactly like listed terminals.  Distances use a sphere
of the mean Earth radius (``MEAN_EARTH_RADIUS_KM``), geodetic latitudes taken as spherical
(the spacing is then within 0.7 % of the distance on the WGS-84 ellipsoid).

Limits (bad input otherwise, before anything is generated): at most ``MAX_TERMINALS`` terminals
per scenario, listed and generated together (five times the 10,000-terminal area the engine is
sized for); polygons of at most ``MAX_POLYGON_VERTICES`` vertices.

Costs: a grid costs O(points + rows x polygon edges crossing them); random points in a polygon
are drawn in batches from its bounding box and kept inside it (matplotlib's point-in-polygon
test), O(points x vertices / fill ratio); the self-intersection check is O(vertices^2).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..orbits.frames import MEAN_EARTH_RADIUS_KM
from .errors import InputError
from .schema import REQUIRED, Field, between, check_table, follow_scenario, ge, gt, label, seed

MAX_TERMINALS = 50_000          # per scenario, listed and generated
MAX_POLYGON_VERTICES = 5_000
MAX_GRID_ROWS = 1_000_000       # latitude rows of one grid (a guard against absurd spacings)
MAX_CROSSINGS = 5_000_000       # polygon edge x grid row crossings of one grid
NOT_TEMPLATE = ("name", "lat_deg", "lon_deg", "track")

_LAT = between(-90, 90)
_LON = between(-180, 360)

AREA_KEYS: dict[str, Field] = {
    "name": label(REQUIRED, doc="label; generated terminals are named <name>-<index>"),
    "lat_min_deg": Field((int, float), None, (_LAT,), "box: southern edge"),
    "lat_max_deg": Field((int, float), None, (_LAT,), "box: northern edge"),
    "lon_min_deg": Field((int, float), None, (_LON,), "box: western edge"),
    "lon_max_deg": Field((int, float), None, (_LON,), "box: eastern edge (may exceed 180)"),
    "polygon": Field((list,), None, (), "vertices [lat_deg, lon_deg], edges straight in "
                     "latitude and longitude"),
    "spacing_km": Field((int, float), None, (gt(0),), "grid spacing along latitude and "
                        "longitude (one point per spacing_km**2)"),
    "count": Field((int,), None, (ge(1),), "random points, uniform in area on the sphere"),
    "seed": seed(),
    "weight": Field((int, float), None, (ge(0),), "weight (population) of every point; "
                    "default 1"),
    "density_per_km2": Field((int, float), None, (ge(0),), "weight per km2: each point "
                             "carries the density times the area it stands for"),
}


@dataclass
class Region:
    """A box or a polygon, in degrees; ``vertices`` is None for a box."""

    lat_min_deg: float
    lat_max_deg: float
    lon_min_deg: float
    lon_max_deg: float
    vertices: np.ndarray | None = None     # (n, 2) [lat_deg, lon_deg], not closed

    @property
    def is_box(self) -> bool:
        return self.vertices is None

    def area_km2(self) -> float:
        """Area on the sphere: ``R^2 dlon (sin lat2 - sin lat1)`` for a box (the zone between
        two parallels, cut by two meridians); for a polygon with edges straight in
        (lon, lat), Green's theorem on ``cos(lat) dlat dlon`` (see :func:`polygon_area_km2`)."""
        if self.is_box:
            return MEAN_EARTH_RADIUS_KM ** 2 * math.radians(
                self.lon_max_deg - self.lon_min_deg) * (
                math.sin(math.radians(self.lat_max_deg)) - math.sin(math.radians(self.lat_min_deg)))
        return polygon_area_km2(self.vertices)

    def contains(self, lat_deg: np.ndarray, lon_deg: np.ndarray) -> np.ndarray:
        """Which points lie in the region (box edges included; a polygon's boundary is
        matplotlib's to decide).  Cost: O(points x vertices)."""
        lat_deg, lon_deg = np.asarray(lat_deg, float), np.asarray(lon_deg, float)
        if self.is_box:
            return ((lat_deg >= self.lat_min_deg) & (lat_deg <= self.lat_max_deg)
                    & (lon_deg >= self.lon_min_deg) & (lon_deg <= self.lon_max_deg))
        from matplotlib.path import Path
        ring = np.vstack([self.vertices[:, ::-1], self.vertices[:1, ::-1]])
        return Path(ring, closed=True).contains_points(np.column_stack([lon_deg, lat_deg]))

    def outline(self) -> tuple[np.ndarray, np.ndarray]:
        """(lat_deg, lon_deg) of the closed outline (for figures)."""
        if self.is_box:
            lat = [self.lat_min_deg, self.lat_min_deg, self.lat_max_deg, self.lat_max_deg,
                   self.lat_min_deg]
            lon = [self.lon_min_deg, self.lon_max_deg, self.lon_max_deg, self.lon_min_deg,
                   self.lon_min_deg]
            return np.array(lat, float), np.array(lon, float)
        v = np.vstack([self.vertices, self.vertices[:1]])
        return v[:, 0].copy(), v[:, 1].copy()


@dataclass
class Points:
    """Generated points of one area."""

    lat_deg: np.ndarray
    lon_deg: np.ndarray
    weight: np.ndarray


@dataclass
class Population:
    """Every generated terminal of a scenario: scenario indices ``first_index`` onwards, in
    order; per terminal its area's name, its index in the area (from 0), position and weight."""

    first_index: int
    area: np.ndarray          # object: area names
    point: np.ndarray         # int64
    lat_deg: np.ndarray
    lon_deg: np.ndarray
    weight: np.ndarray

    def __len__(self) -> int:
        return int(self.point.size)


def polygon_area_km2(vertices: np.ndarray) -> float:
    """Area on the sphere of a polygon whose edges are straight in (lon, lat): by Green's
    theorem ``area = R^2 |sum over edges of the integral of sin(lat) d lon|``, and along an
    edge with lat linear in lon the integral is ``dlon (cos lat_a - cos lat_b) / dlat``
    (``dlon sin lat_a`` when dlat = 0).  Cost: O(vertices)."""
    lat = np.radians(np.asarray(vertices, float)[:, 0])
    lon = np.radians(np.asarray(vertices, float)[:, 1])
    la, lb = lat, np.roll(lat, -1)
    oa, ob = lon, np.roll(lon, -1)
    dlat, dlon = lb - la, ob - oa
    flat = np.abs(dlat) < 1e-15
    with np.errstate(divide="ignore", invalid="ignore"):
        seg = np.where(flat, dlon * np.sin(la), dlon * (np.cos(la) - np.cos(lb)) / dlat)
    return float(abs(seg.sum()) * MEAN_EARTH_RADIUS_KM ** 2)


def _orient(px, py, qx, qy, rx, ry):
    return (qx - px) * (ry - py) - (qy - py) * (rx - px)


def _on_segment(px, py, qx, qy, rx, ry):
    return ((np.minimum(px, qx) <= rx) & (rx <= np.maximum(px, qx))
            & (np.minimum(py, qy) <= ry) & (ry <= np.maximum(py, qy)))


def crossing_edges(vertices: np.ndarray) -> tuple[int, int] | None:
    """The first pair of edges (0-based; edge k joins vertex k to k+1) of a closed ring that
    meet other than at the vertex two neighbouring edges share, or None for a simple ring.
    Orientation tests in the (lon, lat) plane (the textbook segment-intersection test, e.g.
    Cormen et al., Introduction to Algorithms, section 33.1), touching and overlapping
    counted as meeting; neighbouring edges meet wrongly when they fold back on each other.
    Cost: O(n^2) in blocks of edges."""
    v = np.asarray(vertices, float)
    n = len(v)
    x, y = v[:, 1], v[:, 0]
    x2, y2 = np.roll(x, -1), np.roll(y, -1)
    # neighbouring edges k, k+1: folding back = collinear with opposite directions
    dx, dy = x2 - x, y2 - y
    ndx, ndy = np.roll(dx, -1), np.roll(dy, -1)
    fold = (dx * ndy - dy * ndx == 0) & (dx * ndx + dy * ndy < 0)
    if fold.any():
        k = int(np.flatnonzero(fold)[0])
        return k, (k + 1) % n
    block = max(1, 2_000_000 // max(n, 1))
    for i0 in range(0, n, block):
        i = np.arange(i0, min(n, i0 + block))[:, None]
        j = np.arange(n)[None, :]
        # non-neighbouring pairs, each once
        pair = (j > i + 1) & ~((i == 0) & (j == n - 1))
        if not pair.any():
            continue
        ii, jj = np.nonzero(pair)
        ii = ii + i0
        px, py, qx, qy = x[ii], y[ii], x2[ii], y2[ii]
        rx, ry, sx, sy = x[jj], y[jj], x2[jj], y2[jj]
        o1 = _orient(px, py, qx, qy, rx, ry)
        o2 = _orient(px, py, qx, qy, sx, sy)
        o3 = _orient(rx, ry, sx, sy, px, py)
        o4 = _orient(rx, ry, sx, sy, qx, qy)
        meet = ((o1 * o2 < 0) & (o3 * o4 < 0)
                | (o1 == 0) & _on_segment(px, py, qx, qy, rx, ry)
                | (o2 == 0) & _on_segment(px, py, qx, qy, sx, sy)
                | (o3 == 0) & _on_segment(rx, ry, sx, sy, px, py)
                | (o4 == 0) & _on_segment(rx, ry, sx, sy, qx, qy))
        if meet.any():
            k = int(np.flatnonzero(meet)[0])
            return int(ii[k]), int(jj[k])
    return None


def check_region(params: dict[str, Any], source: str, where: str) -> Region:
    """The region of a checked area table; bad boxes and polygons are one InputError line."""
    box_keys = ("lat_min_deg", "lat_max_deg", "lon_min_deg", "lon_max_deg")
    given = [k for k in box_keys if params[k] is not None]
    poly = params["polygon"]
    if poly is not None and given:
        raise InputError(source, f"{where}.{given[0]}", params[given[0]],
                         "an area is a box or a polygon, not both")
    if poly is None:
        if len(given) != 4:
            missing = [k for k in box_keys if params[k] is None]
            raise InputError(source, f"{where}.{missing[0]}", None,
                             "missing: an area needs a box (lat_min_deg, lat_max_deg, "
                             "lon_min_deg, lon_max_deg) or a polygon", show_value=False)
        b = {k: float(params[k]) for k in box_keys}
        if b["lat_min_deg"] > b["lat_max_deg"]:
            raise InputError(source, f"{where}.lat_min_deg", params["lat_min_deg"],
                             "must not exceed lat_max_deg")
        if b["lon_min_deg"] > b["lon_max_deg"]:
            raise InputError(source, f"{where}.lon_min_deg", params["lon_min_deg"],
                             "must not exceed lon_max_deg (write lon_max_deg past 180 to "
                             "cross the antimeridian)")
        if b["lon_max_deg"] - b["lon_min_deg"] > 360.0:
            raise InputError(source, f"{where}.lon_max_deg", params["lon_max_deg"],
                             "the box spans more than 360 deg of longitude")
        return Region(**b)
    key = f"{where}.polygon"
    if len(poly) < 3:
        raise InputError(source, key, poly, f"a polygon needs at least 3 vertices "
                         f"[lat_deg, lon_deg]; it has {len(poly)}")
    if len(poly) > MAX_POLYGON_VERTICES + 1:
        raise InputError(source, key, f"{len(poly)} vertices",
                         f"at most {MAX_POLYGON_VERTICES} vertices are allowed")
    for k, vertex in enumerate(poly):
        vk = f"{key}[{k}]"
        if not isinstance(vertex, list) or len(vertex) != 2 or not all(
                isinstance(c, (int, float)) and not isinstance(c, bool) for c in vertex):
            raise InputError(source, vk, vertex, "a vertex is [lat_deg, lon_deg]")
        if not all(math.isfinite(c) for c in vertex):
            raise InputError(source, vk, vertex, "must be finite numbers")
        for what, c, chk in (("latitude", vertex[0], _LAT), ("longitude", vertex[1], _LON)):
            reason = chk(c)
            if reason:
                raise InputError(source, vk, vertex, f"its {what} {reason}")
    v = np.array(poly, dtype=float)
    if len(v) > 3 and np.array_equal(v[0], v[-1]):
        v = v[:-1]                                   # a closing vertex repeats the first
    same = np.flatnonzero(np.all(v == np.roll(v, -1, axis=0), axis=1))
    if same.size:
        k = int(same[0])
        raise InputError(source, f"{key}[{k}]", poly[k],
                         f"vertices {k} and {(k + 1) % len(v)} are the same point")
    if v[:, 1].max() - v[:, 1].min() >= 360.0:
        raise InputError(source, key, poly, "the polygon spans 360 deg of longitude or more")
    d = v - v[0]
    if np.all(d[:, 0] * d[1, 1] - d[:, 1] * d[1, 0] == 0):
        raise InputError(source, key, poly, "encloses no area (its vertices lie on one line)")
    crossing = crossing_edges(v)
    if crossing is not None:
        a, b = crossing
        raise InputError(source, key, poly,
                         f"crosses itself: edges {a} and {b} meet (edge k joins vertices k and "
                         "k+1; edges may meet only at the vertex two neighbours share)")
    if polygon_area_km2(v) <= 0.0:
        raise InputError(source, key, poly, "encloses no area")
    return Region(float(v[:, 0].min()), float(v[:, 0].max()), float(v[:, 1].min()),
                  float(v[:, 1].max()), v)


# ---- points -----------------------------------------------------------------------------------

def grid_rows(region: Region, spacing_km: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The grid's latitude rows: (row latitudes deg, longitude step deg, points per row of the
    bounding box).  Rows lie ``spacing_km`` apart along the meridian, centred in the region's
    latitude extent; along each row the points lie ``spacing_km`` apart along the parallel
    (a longitude step of ``spacing / (R cos lat)``), centred in the longitude extent, so every
    point stands for ``spacing_km**2`` of the sphere (an equal-area grid; a row at a pole
    holds one point).  Cost: O(rows)."""
    dlat = math.degrees(spacing_km / MEAN_EARTH_RADIUS_KM)
    span = region.lat_max_deg - region.lat_min_deg
    n_rows = int(math.floor(span / dlat + 1e-9)) + 1
    mid = 0.5 * (region.lat_min_deg + region.lat_max_deg)
    lat = np.clip(mid + (np.arange(n_rows) - 0.5 * (n_rows - 1)) * dlat, -90.0, 90.0)
    cos = np.cos(np.radians(lat))
    with np.errstate(divide="ignore"):
        dlon = np.where(cos > 1e-12, np.degrees(spacing_km / (MEAN_EARTH_RADIUS_KM * cos)),
                        np.inf)
    width = region.lon_max_deg - region.lon_min_deg
    per_row = np.where(np.isfinite(dlon), np.floor(width / dlon + 1e-9), 0).astype(np.int64) + 1
    return lat, dlon, per_row


def _row_intervals(region: Region, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(row index, west lon, east lon) of the stretches of each grid row inside the region:
    the whole row for a box; for a polygon the pairs of sorted edge crossings (even-odd rule,
    an edge spanning [lat_a, lat_b) in latitude so that a vertex on a row counts once)."""
    if region.is_box:
        rows = np.arange(lat.size)
        return (rows, np.full(lat.size, region.lon_min_deg), np.full(lat.size, region.lon_max_deg))
    v = region.vertices
    la, oa = v[:, 0], v[:, 1]
    lb, ob = np.roll(la, -1), np.roll(oa, -1)
    lo, hi = np.minimum(la, lb), np.maximum(la, lb)
    k_lo = np.searchsorted(lat, lo, side="left")
    k_hi = np.searchsorted(lat, hi, side="left")
    n = np.maximum(k_hi - k_lo, 0)
    edge = np.repeat(np.arange(v.shape[0]), n)
    row = np.repeat(k_lo, n) + (np.arange(n.sum()) - np.repeat(np.cumsum(n) - n, n))
    t = (lat[row] - la[edge]) / (lb[edge] - la[edge])
    lon = oa[edge] + t * (ob[edge] - oa[edge])
    order = np.lexsort((lon, row))
    row, lon = row[order], lon[order]
    return row[0::2], lon[0::2], lon[1::2]


def grid_points(region: Region, spacing_km: float) -> tuple[np.ndarray, np.ndarray]:
    """(lat_deg, lon_deg) of the grid points inside the region (see :func:`grid_rows`), row by
    row from south to north, west to east within a row.  A polygon keeps the points of the
    bounding box's grid that fall inside it.  Cost: O(points + crossings)."""
    lat, dlon, per_row = grid_rows(region, spacing_km)
    mid_lon = 0.5 * (region.lon_min_deg + region.lon_max_deg)
    row, west, east = _row_intervals(region, lat)
    step = np.where(np.isfinite(dlon), dlon, 1.0)[row]
    half = 0.5 * (per_row[row] - 1)
    finite = np.isfinite(dlon[row])
    j_lo = np.where(finite, np.ceil((west - mid_lon) / step + half - 1e-9), 0).astype(np.int64)
    j_hi = np.where(finite, np.floor((east - mid_lon) / step + half + 1e-9), 0).astype(np.int64)
    if not region.is_box:      # a pole row's single point must lie in the stretch
        pole = ~finite & ~((west <= mid_lon) & (mid_lon <= east))
        j_hi = np.where(pole, -1, j_hi)
    j_lo = np.maximum(j_lo, 0)
    j_hi = np.minimum(j_hi, per_row[row] - 1)
    n = np.maximum(j_hi - j_lo + 1, 0)
    rr = np.repeat(row, n)
    j = np.repeat(j_lo, n) + (np.arange(n.sum()) - np.repeat(np.cumsum(n) - n, n))
    out_lon = np.where(np.isfinite(dlon[rr]),
                       mid_lon + (j - 0.5 * (per_row[rr] - 1)) * np.where(
                           np.isfinite(dlon[rr]), dlon[rr], 0.0), mid_lon)
    return lat[rr].astype(float), out_lon.astype(float)


def random_points(region: Region, count: int, seed_value: int) -> tuple[np.ndarray, np.ndarray]:
    """``count`` points uniform in area on the sphere inside the region: longitude uniform and
    sin(latitude) uniform over the bounding box (Archimedes' hat-box theorem: equal bands of
    sin(lat) hold equal areas), kept when inside a polygon (drawn in batches until enough).
    The same seed gives the same points.  Cost: O(draws x vertices)."""
    rng = np.random.default_rng(seed_value)
    s1, s2 = math.sin(math.radians(region.lat_min_deg)), math.sin(math.radians(region.lat_max_deg))

    def draw(n: int) -> tuple[np.ndarray, np.ndarray]:
        lat = np.degrees(np.arcsin(np.clip(rng.uniform(s1, s2, n), -1.0, 1.0)))
        lon = rng.uniform(region.lon_min_deg, region.lon_max_deg, n)
        return lat, lon
    if region.is_box:
        return draw(count)
    box = Region(region.lat_min_deg, region.lat_max_deg, region.lon_min_deg,
                 region.lon_max_deg).area_km2()
    fill = max(region.area_km2() / box, 1e-6) if box > 0 else 1.0
    lats, lons, got = [], [], 0
    for _ in range(1000):
        lat, lon = draw(max(4096, int(math.ceil(1.25 * (count - got) / fill))))
        keep = region.contains(lat, lon)
        lats.append(lat[keep])
        lons.append(lon[keep])
        got += int(keep.sum())
        if got >= count:
            break
    return np.concatenate(lats)[:count], np.concatenate(lons)[:count]


def expected_points(params: dict[str, Any], region: Region) -> float:
    """How many points an area will generate, before generating them: ``count``, or the
    region's area over ``spacing_km**2`` (the grid's density; the edges add or remove up to
    about a perimeter's worth of points over a spacing)."""
    if params["count"] is not None:
        return float(params["count"])
    return region.area_km2() / float(params["spacing_km"]) ** 2 + 1.0


def generate(params: dict[str, Any], region: Region, seed_value: int) -> Points:
    """The points of a checked area: positions and weights (see the module docstring)."""
    if params["count"] is not None:
        lat, lon = random_points(region, int(params["count"]), seed_value)
        each_km2 = region.area_km2() / int(params["count"])
    else:
        lat, lon = grid_points(region, float(params["spacing_km"]))
        each_km2 = float(params["spacing_km"]) ** 2
    if params["density_per_km2"] is not None:
        w = float(params["density_per_km2"]) * each_km2
    else:
        w = float(params["weight"])
    return Points(lat, lon, np.full(lat.size, w))


# ---- tables -----------------------------------------------------------------------------------

def template_keys(terminal_keys: dict[str, Field]) -> dict[str, Field]:
    """The ``[[terminal]]`` keys an area takes as its points' template."""
    return {k: f for k, f in terminal_keys.items() if k not in NOT_TEMPLATE}


def check_area(table: Any, terminal_keys: dict[str, Field], source: str, where: str
               ) -> tuple[dict[str, Any], Region]:
    """Check one ``[[area]]`` table: its keys, the region, how points are laid, the weight."""
    if isinstance(table, dict) and "track" in table:
        raise InputError(source, f"{where}.track", table["track"],
                         "an area's points stand still or drive (drive); one track cannot be "
                         "every point's path")
    params = check_table(table, {**AREA_KEYS, **template_keys(terminal_keys)}, source, where)
    follow_scenario(params)              # seed = "scenario": as if absent
    region = check_region(params, source, where)
    if (params["spacing_km"] is None) == (params["count"] is None):
        key = "spacing_km" if params["spacing_km"] is not None else "count"
        raise InputError(source, f"{where}.{key}", params[key],
                         "give spacing_km (a grid) or count (random points), one of them",
                         show_value=params[key] is not None)
    if params["weight"] is not None and params["density_per_km2"] is not None:
        raise InputError(source, f"{where}.density_per_km2", params["density_per_km2"],
                         "give weight or density_per_km2, not both")
    if params["weight"] is None and params["density_per_km2"] is None:
        params["weight"] = 1.0                 # resolved, so run.toml says it
    return params, region


def _grid_guards(params: dict, region: Region, source: str, where: str) -> None:
    """Refuse grids whose rows or polygon crossings alone would be too many to lay."""
    if params["spacing_km"] is None:
        return
    key = f"{where}.spacing_km"
    dlat = math.degrees(float(params["spacing_km"]) / MEAN_EARTH_RADIUS_KM)
    if (region.lat_max_deg - region.lat_min_deg) / dlat > MAX_GRID_ROWS:
        raise InputError(source, key, params["spacing_km"],
                         f"would lay more than {MAX_GRID_ROWS:,} grid rows; use a larger spacing")
    if not region.is_box:
        lat = grid_rows(region, float(params["spacing_km"]))[0]
        v = region.vertices
        lo = np.minimum(v[:, 0], np.roll(v[:, 0], -1))
        hi = np.maximum(v[:, 0], np.roll(v[:, 0], -1))
        crossings = int((np.searchsorted(lat, hi) - np.searchsorted(lat, lo)).sum())
        if crossings > MAX_CROSSINGS:
            raise InputError(source, key, params["spacing_km"],
                             f"the polygon's edges cross {crossings:,} grid rows (at most "
                             f"{MAX_CROSSINGS:,}); use a larger spacing or a simpler outline")


def expand(tables: list[dict], terminal_keys: dict[str, Field], scenario_seed: int,
           source: str, taken: set[str], first_index: int,
           check_template: Callable[[dict, str], None]
           ) -> tuple[list[dict], list[dict], Population]:
    """Check every ``[[area]]`` table and generate its terminals.

    ``taken`` holds the listed terminals' names (generated names must differ; it is extended),
    ``first_index`` is the scenario index of the first generated terminal, and
    ``check_template(params, where)`` runs the terminal checks on each area's template (once
    per area).  Returns (checked area tables, generated terminal tables, population).  The
    terminal limit is checked on the expected count before any point is generated."""
    from ..obstruction import seed_for

    checked, terminals = [], []
    areas, points, lat_all, lon_all, w_all = [], [], [], [], []
    total = float(first_index)
    for i, table in enumerate(tables):
        where = f"area[{i + 1}]"
        params, region = check_area(table, terminal_keys, source, where)
        expected = expected_points(params, region)
        if total + expected > MAX_TERMINALS:
            key = "count" if params["count"] is not None else "spacing_km"
            how = (f"{expected:,.0f} random points" if key == "count" else
                   f"about {expected:,.0f} terminals ({region.area_km2():,.0f} km2 at one "
                   f"terminal per {float(params['spacing_km']) ** 2:g} km2)")
            raise InputError(source, f"{where}.{key}", params[key],
                             f"would generate {how}, {total + expected:,.0f} terminals in the "
                             f"scenario; at most {MAX_TERMINALS:,} are allowed (use a "
                             f"{'smaller count' if key == 'count' else 'larger spacing'} or a "
                             "smaller area)")
        _grid_guards(params, region, source, where)
        template = {k: params[k] for k in template_keys(terminal_keys)}
        probe = {**template, "name": params["name"], "lat_deg": 0.0, "lon_deg": 0.0,
                 "track": None}
        check_template(probe, where)
        for k in template:        # the checks resolve parts of the template (seeds, paths)
            template[k] = params[k] = probe[k]
        pts = generate(params, region, seed_for(scenario_seed, "area", i, params["seed"]))
        n = pts.lat_deg.size
        if n == 0:
            raise InputError(source, f"{where}.spacing_km", params["spacing_km"],
                             "generates no terminal: no grid point falls inside the polygon "
                             "(use a smaller spacing)")
        if first_index + len(terminals) + n > MAX_TERMINALS:
            raise InputError(source, f"{where}.spacing_km", params["spacing_km"],
                             f"generates {n:,} terminals, {first_index + len(terminals) + n:,} "
                             f"in the scenario; at most {MAX_TERMINALS:,} are allowed")
        width = max(3, len(str(n)))
        for j in range(n):
            name = f"{params['name']}-{j + 1:0{width}d}"
            if name in taken:
                raise InputError(source, f"{where}.name", params["name"],
                                 f"its terminal {name} has the name of another terminal")
            taken.add(name)
            term = {}
            for k in terminal_keys:
                if k == "name":
                    term[k] = name
                elif k == "lat_deg":
                    term[k] = float(pts.lat_deg[j])
                elif k == "lon_deg":
                    term[k] = float(pts.lon_deg[j])
                elif k == "track":
                    term[k] = None
                else:
                    term[k] = copy.deepcopy(template[k])
            canyon = term.get("canyon")
            if canyon is not None and canyon.get("seed") is not None:
                # a canyon's own seed fixes its buildings; each point derives its own from it
                canyon["seed"] = seed_for(int(canyon["seed"]), "canyon",
                                          first_index + len(terminals))
            terminals.append(term)
        total = first_index + len(terminals)
        checked.append(params)
        areas.append(np.full(n, params["name"], dtype=object))
        points.append(np.arange(n, dtype=np.int64))
        lat_all.append(pts.lat_deg)
        lon_all.append(pts.lon_deg)
        w_all.append(pts.weight)
    pop = Population(first_index, _cat(areas, object), _cat(points, np.int64),
                     _cat(lat_all, float), _cat(lon_all, float), _cat(w_all, float))
    return checked, terminals, pop


def _cat(parts: list[np.ndarray], dtype) -> np.ndarray:
    return np.concatenate(parts).astype(dtype) if parts else np.zeros(0, dtype=dtype)


def region_of(params: dict[str, Any]) -> Region:
    """The region of a resolved area table (as run.toml holds it), unchecked."""
    if params.get("polygon") is not None:
        v = np.array(params["polygon"], dtype=float)
        if len(v) > 3 and np.array_equal(v[0], v[-1]):
            v = v[:-1]
        return Region(float(v[:, 0].min()), float(v[:, 0].max()), float(v[:, 1].min()),
                      float(v[:, 1].max()), v)
    return Region(float(params["lat_min_deg"]), float(params["lat_max_deg"]),
                  float(params["lon_min_deg"]), float(params["lon_max_deg"]))


def terminal_weights(scen) -> np.ndarray:
    """Weight of every terminal of a scenario in order: 1 for listed terminals, the area's
    weight for generated ones."""
    w = np.ones(len(scen.terminals))
    pop = getattr(scen, "population", None)
    if pop is not None and len(pop):
        w[pop.first_index:pop.first_index + len(pop)] = pop.weight
    return w
