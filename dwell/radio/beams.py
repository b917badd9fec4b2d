"""Multi-beam satellites: the beam layout of one ``[[constellation]]`` table, the satellite's
beam frame, and which beams a direction falls in.

Frame contract (users and checks rely on it): the satellite frame has z towards nadir (the
Earth's centre), x along the component of the satellite's TEME velocity perpendicular to nadir
(along-track), y = z x x.  A direction seen from the satellite has direction cosines
(u, v, w) on (x, y, z).  Beam centres lie on a hexagonal lattice in the (u, v) plane:
neighbouring centres are ``spacing_deg`` apart at nadir (``|delta(u, v)| = sin(spacing_deg)``),
one lattice axis lies along x and beam 0 points at nadir.  Lattice points are named by axial
coordinates (q, r): ``(u, v) = sin(spacing) * (q + r / 2, r * sqrt(3) / 2)``.

Beams are numbered ring by ring (ring 0 is beam 0 at nadir; ring k holds 6k beams, counted
counter-clockwise from +x), so ``rings = R`` gives ``1 + 3 R (R + 1)`` beams.  Frequency reuse
colours the lattice so that co-channel centres are ``sqrt(N)`` spacings apart (N = 1, 3, 4, 7),
the usual cellular cluster sizes (``D = R sqrt(3 N)`` with R the cell radius; Rappaport,
Wireless Communications, 2nd ed., section 3.2).

Finding a direction's beams costs O(1): the nearest lattice point by hexagonal rounding, then
its fixed neighbourhood (19 points within two rings, 37 for reuse 7) as candidates; no search
over beams.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..io.errors import InputError
from ..io.schema import Field, between, ge, gt, integer, le, number, text

LAYOUTS = ("single", "hex")
CELL_MODES = ("earth-moving", "earth-fixed")
REUSE_FACTORS = (1, 3, 4, 7)
MAX_RINGS = 20              # 1261 beams: more than any payload in the 3GPP NTN studies
SQRT3 = math.sqrt(3.0)

# a direction is measured by a beam whose lattice centre lies within this many spacings of
# it in the (u, v) plane: a disc, so a beam enters and leaves the measured set once as the
# direction moves past it (about 5.7 beams measured on average, 3 at least inside the layout)
MEASURE_RADIUS_SPACINGS = 1.25

KEYS: dict[str, Field] = {
    "layout": text("single", choices=LAYOUTS,
                   doc="single: one nadir beam per satellite (the [link] antenna); hex: a "
                       "hexagonal lattice of spot beams"),
    "rings": integer(2, ge(0), le(MAX_RINGS), doc="rings of the hex layout: 1 + 3R(R+1) beams"),
    "spacing_deg": Field((int, float), None, (gt(0), le(90)),
                         "angle at the satellite between neighbouring beam centres (default: "
                         "the beam's -3 dB width, so neighbours cross near -3 dB; common "
                         "practice)"),
    "aperture_m": Field((int, float), None, (gt(0), le(100)),
                        "aperture diameter of each beam (TR 38.811 section 6.4.1 pattern); "
                        "default: [link] sat_aperture_m"),
    "max_gain_dbi": Field((int, float), None, (between(0, 80),),
                          "peak gain of each beam; default: [link] sat_max_gain_dbi"),
    "reuse": Field((int,), 1, (), "frequency reuse factor (colours; one colour shares a "
                   "frequency)", choices=REUSE_FACTORS),
    "load": number(1.0, between(0, 1), doc="fraction of resources each beam transmits (scales "
                   "the interference it causes)"),
    "cell_mode": text("earth-moving", choices=CELL_MODES,
                      doc="earth-moving: beams fixed in the satellite frame; earth-fixed: fixed "
                          "ground cells, each served by a beam steered at its centre"),
    "cell_spacing_km": Field((int, float), None, (gt(0), le(5000)),
                             "distance between neighbouring earth-fixed cell centres"),
    "cell_min_elevation_deg": number(25.0, between(0, 90),
                                     doc="elevation at a cell's centre above which a satellite "
                                         "may serve the cell (earth-fixed)"),
    "cell_origin_lat_deg": Field((int, float), None, (between(-90, 90),),
                                 "centre of the earth-fixed cell lattice (default: the mean "
                                 "terminal position)"),
    "cell_origin_lon_deg": Field((int, float), None, (between(-180, 360),),
                                 "centre of the earth-fixed cell lattice"),
}

# candidate beams around a direction's nearest lattice point: every co-channel beam within
# the nearest co-channel distance sqrt(N) spacings must be among them, so two rings (19 points)
# for N = 1, 3, 4 and three rings (37) for N = 7; beams further off lie in the far sidelobes
# (below -26 dB when neighbours are spaced by the -3 dB width)
NEIGHBOURHOOD_RINGS = {1: 2, 3: 2, 4: 2, 7: 3}


def neighbourhood(rings: int) -> tuple[np.ndarray, np.ndarray]:
    """Axial offsets of the lattice points within ``rings`` of a point, ring by ring."""
    return _beam_axial(rings)


def hex_distance(q: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Lattice steps from the origin to axial point (q, r)."""
    q, r = np.asarray(q), np.asarray(r)
    return (np.abs(q) + np.abs(r) + np.abs(q + r)) // 2


def reuse_colour(q: np.ndarray, r: np.ndarray, reuse: int) -> np.ndarray:
    """Colour 0..N-1 of axial lattice points for reuse factor N in {1, 3, 4, 7}.

    Each colouring gives a point and its six neighbours distinct colours (N = 7: all seven
    distinct), and co-channel points lie ``sqrt(N)`` spacings apart, the classic cluster
    patterns of hexagonal cellular layouts (Rappaport, section 3.2).
    """
    q, r = np.asarray(q, dtype=np.int64), np.asarray(r, dtype=np.int64)
    if reuse == 1:
        return np.zeros(np.broadcast(q, r).shape, dtype=np.int64)
    if reuse == 3:
        return np.mod(q - r, 3)
    if reuse == 4:
        return np.mod(q, 2) + 2 * np.mod(r, 2)
    if reuse == 7:
        return np.mod(q + 3 * r, 7)
    raise ValueError(f"reuse must be one of {REUSE_FACTORS}")


def nearest_axial(x: np.ndarray, y: np.ndarray, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Nearest lattice point (axial q, r) of plane points (x, y) on a hexagonal lattice with
    neighbour spacing ``spacing`` and one axis along x (cube-coordinate rounding)."""
    rf = np.asarray(y, dtype=float) / (spacing * SQRT3 / 2.0)
    qf = np.asarray(x, dtype=float) / spacing - rf / 2.0
    sf = -qf - rf
    q, r, s = np.rint(qf), np.rint(rf), np.rint(sf)
    dq, dr, ds = np.abs(q - qf), np.abs(r - rf), np.abs(s - sf)
    fix_q = (dq > dr) & (dq > ds)
    fix_r = ~fix_q & (dr > ds)
    q = np.where(fix_q, -r - s, q)
    r = np.where(fix_r, -q - s, r)
    return q.astype(np.int64), r.astype(np.int64)


def lattice_xy(q: np.ndarray, r: np.ndarray, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Plane position of axial lattice points."""
    q, r = np.asarray(q, dtype=float), np.asarray(r, dtype=float)
    return spacing * (q + r / 2.0), spacing * r * SQRT3 / 2.0


def beamwidth_3db_deg(aperture_m: float, frequency_ghz: float) -> float:
    """Full -3 dB width of the TR 38.811 pattern (uniform circular aperture): the x where
    (2 J1(x)/x)^2 = 10^-0.3 is 1.6137, so theta_3dB = 2 asin(1.6137 / (k a)).  This gives the
    3 dB beamwidths TR 38.821 tabulates (4.4127 deg for a 2 m aperture at 2 GHz, 1.7647 deg for
    0.5 m at 20 GHz); about 58.8 lambda/D for large apertures."""
    from scipy.optimize import brentq
    from scipy.special import j1

    x3 = brentq(lambda x: (2.0 * j1(x) / x) ** 2 - 10.0 ** -0.3, 1.0, 2.5)
    ka = 2.0 * math.pi * frequency_ghz * 1e9 / 299792458.0 * aperture_m / 2.0
    return 2.0 * math.degrees(math.asin(min(1.0, x3 / ka)))


def satellite_frame(r_sat: np.ndarray, v_sat: np.ndarray) -> np.ndarray:
    """Rows x, y, z of the satellite beam frame (see the module docstring), shape (..., 3, 3)."""
    z = -r_sat / np.linalg.norm(r_sat, axis=-1, keepdims=True)
    x = v_sat - np.einsum("...i,...i->...", v_sat, z)[..., None] * z
    x = x / np.linalg.norm(x, axis=-1, keepdims=True)
    y = np.cross(z, x)
    return np.stack([x, y, z], axis=-2)


def direction_cosines(frame: np.ndarray, r_sat: np.ndarray, target: np.ndarray) -> np.ndarray:
    """(u, v, w) of the direction from the satellite to ``target`` in its beam frame, (..., 3)."""
    d = target - r_sat
    d = d / np.linalg.norm(d, axis=-1, keepdims=True)
    return np.einsum("...ij,...j->...i", frame, d)


@dataclass(frozen=True)
class BeamLayout:
    """The checked ``[constellation.beams]`` table of one constellation, with its lattice."""

    layout: str
    rings: int
    spacing_deg: float
    aperture_m: float
    max_gain_dbi: float
    reuse: int
    load: float
    cell_mode: str
    cell_spacing_km: float | None
    cell_min_elevation_deg: float
    cell_origin_lat_deg: float | None
    cell_origin_lon_deg: float | None

    @classmethod
    def from_params(cls, p: dict[str, Any]) -> "BeamLayout":
        return cls(p["layout"], int(p["rings"]), float(p["spacing_deg"] or 0.0),
                   float(p["aperture_m"]),
                   float(p["max_gain_dbi"]), int(p["reuse"]), float(p["load"]), p["cell_mode"],
                   None if p["cell_spacing_km"] is None else float(p["cell_spacing_km"]),
                   float(p["cell_min_elevation_deg"]),
                   p.get("cell_origin_lat_deg"), p.get("cell_origin_lon_deg"))

    @property
    def single(self) -> bool:
        return self.layout == "single"

    @property
    def earth_fixed(self) -> bool:
        return self.layout == "hex" and self.cell_mode == "earth-fixed"

    @property
    def n_beams(self) -> int:
        return 1 if self.single else 1 + 3 * self.rings * (self.rings + 1)

    @property
    def candidate_offsets(self) -> tuple[np.ndarray, np.ndarray]:
        """Axial offsets of the beams that may matter around a direction's nearest beam."""
        return neighbourhood(NEIGHBOURHOOD_RINGS[self.reuse])

    @property
    def spacing_uv(self) -> float:
        return math.sin(math.radians(self.spacing_deg))

    def axial(self) -> tuple[np.ndarray, np.ndarray]:
        """Axial coordinates of every beam, in beam-number order."""
        return _beam_axial(self.rings if not self.single else 0)

    def beam_index(self, q: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Beam number of axial points, -1 where the layout has no beam."""
        R = 0 if self.single else self.rings
        table = _index_table(R)
        q, r = np.asarray(q), np.asarray(r)
        inside = hex_distance(q, r) <= R
        qi = np.clip(q + R, 0, 2 * R)
        ri = np.clip(r + R, 0, 2 * R)
        return np.where(inside, table[qi, ri], -1)

    def colour(self, q: np.ndarray, r: np.ndarray) -> np.ndarray:
        return reuse_colour(q, r, self.reuse)

    def boresight_uvw(self, q: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Unit boresight directions (u, v, w) of lattice points, (..., 3)."""
        u, v = lattice_xy(q, r, self.spacing_uv)
        w = np.sqrt(np.clip(1.0 - u * u - v * v, 0.0, 1.0))
        return np.stack([u, v, w], axis=-1)

    def max_off_nadir_deg(self) -> float:
        """Off-nadir angle of the outermost beam centres."""
        if self.single:
            return 0.0
        q, r = self.axial()
        u, v = lattice_xy(q, r, self.spacing_uv)
        return math.degrees(math.asin(min(1.0, float(np.max(np.hypot(u, v))))))


def _beam_axial(rings: int) -> tuple[np.ndarray, np.ndarray]:
    cached = _AXIAL.get(rings)
    if cached is None:
        span = np.arange(-rings, rings + 1)
        q, r = np.meshgrid(span, span, indexing="ij")
        q, r = q.ravel(), r.ravel()
        keep = hex_distance(q, r) <= rings
        q, r = q[keep], r[keep]
        x, y = lattice_xy(q, r, 1.0)
        ang = np.mod(np.arctan2(y, x), 2 * np.pi)
        ang = np.where(np.isclose(ang, 2 * np.pi), 0.0, ang)
        order = np.lexsort((np.round(ang, 9), hex_distance(q, r)))
        cached = _AXIAL[rings] = (q[order], r[order])
    return cached


def _index_table(rings: int) -> np.ndarray:
    table = _TABLES.get(rings)
    if table is None:
        q, r = _beam_axial(rings)
        table = np.full((2 * rings + 1, 2 * rings + 1), -1, dtype=np.int64)
        table[q + rings, r + rings] = np.arange(q.size)
        _TABLES[rings] = table
    return table


_AXIAL: dict[int, tuple[np.ndarray, np.ndarray]] = {}
_TABLES: dict[int, np.ndarray] = {}


def check_table(raw: Any, link_params: dict[str, Any], source: str, where: str
                ) -> dict[str, Any]:
    """Check a ``[constellation.beams]`` table; fill defaults from the ``[link]`` antenna."""
    from ..io.schema import check_table as _check

    if raw is None:
        raw = {}
    where_b = f"{where}.beams"
    if isinstance(raw, dict) and isinstance(raw.get("rings"), int) and \
            not isinstance(raw.get("rings"), bool) and raw["rings"] > MAX_RINGS:
        raise InputError(source, f"{where_b}.rings", raw["rings"],
                         f"at most {MAX_RINGS} rings ({1 + 3 * MAX_RINGS * (MAX_RINGS + 1)} "
                         "beams): more beams than any payload the 3GPP NTN studies consider, "
                         "and the run's cost grows with them")
    p = _check(raw, KEYS, source, where_b)
    if p["aperture_m"] is None:
        p["aperture_m"] = float(link_params["sat_aperture_m"])
    if p["max_gain_dbi"] is None:
        p["max_gain_dbi"] = float(link_params["sat_max_gain_dbi"])
    if p["spacing_deg"] is None and p["layout"] == "hex":
        width = beamwidth_3db_deg(p["aperture_m"], float(link_params["frequency_ghz"]))
        if width >= 89.0:
            raise InputError(source, f"{where_b}.aperture_m", p["aperture_m"],
                             f"the beams are {width:.0f} deg wide at "
                             f"{link_params['frequency_ghz']:g} GHz, too wide for a hex layout "
                             "(give a larger aperture or spacing_deg)")
        p["spacing_deg"] = round(width, 6)
    if p["layout"] == "single":
        for key in ("cell_spacing_km",):
            if p[key] is not None:
                raise InputError(source, f"{where_b}.{key}", p[key],
                                 "only for layout = \"hex\" with cell_mode = \"earth-fixed\"")
        if p["cell_mode"] != "earth-moving":
            raise InputError(source, f"{where_b}.cell_mode", p["cell_mode"],
                             "a single-beam layout has no earth-fixed cells (use layout = \"hex\")")
    if p["cell_mode"] == "earth-fixed" and p["cell_spacing_km"] is None:
        raise InputError(source, f"{where_b}.cell_spacing_km", None,
                         "earth-fixed cells need cell_spacing_km (distance between cell "
                         "centres)", show_value=False)
    if (p["cell_origin_lat_deg"] is None) != (p["cell_origin_lon_deg"] is None):
        key = "cell_origin_lon_deg" if p["cell_origin_lon_deg"] is None else "cell_origin_lat_deg"
        raise InputError(source, f"{where_b}.{key}", None,
                         "give both cell_origin_lat_deg and cell_origin_lon_deg, or neither",
                         show_value=False)
    return p


def check_against_orbit(p: dict[str, Any], min_altitude_km: float, source: str,
                        where: str) -> None:
    """Refuse a hex spacing wider than the satellite's Earth disc (the angular radius of the
    Earth seen from the lowest satellite of the table)."""
    if p["layout"] != "hex" or not math.isfinite(min_altitude_km) or min_altitude_km <= 0:
        return
    from ..orbits.frames import MEAN_EARTH_RADIUS_KM
    disc_deg = math.degrees(math.asin(MEAN_EARTH_RADIUS_KM / (MEAN_EARTH_RADIUS_KM +
                                                              min_altitude_km)))
    if p["spacing_deg"] >= disc_deg:
        raise InputError(source, f"{where}.beams.spacing_deg", p["spacing_deg"],
                         f"wider than the Earth disc seen from the satellite ({disc_deg:.1f} deg "
                         f"half-angle at {min_altitude_km:.0f} km): neighbouring beams would "
                         "miss the Earth")
