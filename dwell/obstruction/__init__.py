"""Obstruction and motion of terminals: horizon masks, street canyons, statistical line of sight,
tracks and drives.  This package turns a terminal's table into a :class:`~.site.Site`.

Terminal keys added here (a contract, like the core keys):

- ``mask = "file.csv"``: horizon mask (see :mod:`.horizon` for the format and interpolation rule);
- ``[terminal.canyon]``: a generated street canyon (see :mod:`.canyon`);
- ``[terminal.los]``: 3GPP TR 38.811 statistical line of sight (see :mod:`.los`);
- ``track = "file.csv"`` with ``track_max_speed_m_s``: a moving terminal (see :mod:`.motion`);
- ``[terminal.drive]``: a straight drive (``speed_m_s``, ``heading_deg``, ``start_m``); in a
  canyon it follows the street and the buildings pass by;
- ``mask_step_s``: obstruction sampling step inside passes (edges are then bisected).
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from ..io.errors import InputError
from ..io.schema import REQUIRED, Field, between, follow_scenario, gt, le, number, table
from ..radio.noise import stream_id
from . import canyon as canyon_mod
from . import los as los_mod
from .horizon import HorizonMask
from .motion import Drive, Static, Track
from .site import Site

DRIVE_KEYS = {
    "speed_m_s": number(REQUIRED, gt(0), doc="driving speed"),
    "heading_deg": Field((int, float), None, (between(0, 360),),
                         "direction of travel; in a canyon, the street axis or its reverse"),
    "start_m": number(0.0, doc="along-street (or along-path) position at the scenario start"),
}

TERMINAL_KEYS: dict[str, Field] = {
    "mask": Field((str,), None, (), "horizon mask CSV (azimuth_deg,elevation_deg)"),
    "canyon": table(canyon_mod.KEYS, doc="generated street canyon"),
    "los": table(los_mod.KEYS, doc="statistical line of sight (3GPP TR 38.811)"),
    "track": Field((str,), None, (), "track CSV (time,lat_deg,lon_deg,alt_m)"),
    "track_max_speed_m_s": number(400.0, gt(0), le(3e4),
                                  doc="legs (and drives) faster than this are input errors"),
    "drive": table(DRIVE_KEYS, doc="straight drive at constant speed"),
    "mask_step_s": number(1.0, gt(0), doc="obstruction sampling step inside passes"),
}


def check_terminal(params: dict[str, Any], source: str, where: str) -> None:
    """Cross-key checks that need no file access."""
    follow_scenario(params["canyon"])       # seed = "scenario": derived like an absent seed
    follow_scenario(params["los"])
    if params["track"] is not None and params["drive"] is not None:
        raise InputError(source, f"{where}.drive", "table",
                         "a terminal follows either a track or a drive, not both")
    drive = params["drive"]
    if drive is not None and drive["speed_m_s"] > params["track_max_speed_m_s"]:
        # the bound tracks have: a terminal faster than this is a mistake, not a vehicle
        raise InputError(source, f"{where}.drive.speed_m_s", drive["speed_m_s"],
                         f"faster than track_max_speed_m_s = {params['track_max_speed_m_s']:g}"
                         " (raise that key for a faster vehicle)")
    if params["canyon"] is not None:
        canyon_mod.check(params["canyon"], source, where)
        if params["track"] is not None:
            raise InputError(source, f"{where}.track", params["track"],
                             "a canyon terminal stands still or drives along the street (use drive)")
        drive = params["drive"]
        if drive is not None and drive["heading_deg"] is not None:
            street = params["canyon"]["azimuth_deg"]
            off = (drive["heading_deg"] - street) % 360.0
            if min(off, abs(off - 180.0), 360.0 - off) > 1e-6:
                raise InputError(source, f"{where}.drive.heading_deg", drive["heading_deg"],
                                 f"must follow the street axis ({street:g} or {(street + 180) % 360:g})")


def seed_for(scenario_seed: int, stream: str, index: int, own: int | None = None) -> int:
    """A per-terminal seed derived from the scenario seed (or the table's own seed)."""
    base = scenario_seed if own is None else own
    return int(np.random.SeedSequence([int(base), stream_id(stream), int(index)])
               .generate_state(1)[0])


class CanyonObstruction:
    """A street canyon seen from a terminal that stands in it or drives along it.

    A driving terminal evaluates the exact mask at its position for every query.  A standing
    one evaluates the exact mask once on a ``TABLE_STEP_DEG`` azimuth grid and interpolates
    linearly between grid points: a building edge then moves by at most 0.01 deg, about 0.02 s
    of a pass, well inside the 0.05 s to which window edges are refined.
    """

    TABLE_STEP_DEG = 0.01

    def __init__(self, canyon: "canyon_mod.Canyon", motion, floor_deg: float, moving: bool):
        self.canyon = canyon
        self.motion = motion
        self.floor_deg = floor_deg
        self.max_deg = 90.0
        self._table = None
        if not moving:
            az = np.arange(0.0, 360.0 + self.TABLE_STEP_DEG / 2, self.TABLE_STEP_DEG)
            along = float(motion.along_m(np.zeros(1))[0])
            el = canyon.mask_elevation_deg(az[:-1], along, floor_deg=floor_deg)
            self._table = (az, np.append(el, el[0]))

    def elevation_deg(self, azimuth_deg: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        if self._table is not None:
            return np.interp(np.mod(azimuth_deg, 360.0), *self._table)
        along = self.motion.along_m(np.broadcast_to(t_s, np.shape(azimuth_deg)))
        return self.canyon.mask_elevation_deg(azimuth_deg, along, floor_deg=self.floor_deg)


class LosSettings:
    """Statistical line-of-sight settings of one terminal, with a sampler for the pass finder."""

    def __init__(self, params: dict, seed: int, terminal_index: int):
        self.environment = params["environment"]
        self.decorrelation_s = float(params["decorrelation_s"])
        self.step_s = float(params["step_s"])
        self.nlos_loss_db = params["nlos_loss_db"]
        self.seed = int(seed)
        self.terminal_index = int(terminal_index)
        self.rho = los_mod.lag_correlation(self.step_s, self.decorrelation_s)
        self._carry: dict[int, float] = {}      # satellite -> latent value at a chunk's end

    @property
    def blocks(self) -> bool:
        return self.nlos_loss_db is None

    def __call__(self, site: Site, passes, pid, tt, grid_index, is_first, elevation_deg):
        """LOS flags at the pass samples (see :func:`dwell.orbits.passes._obstructed`)."""
        if not self.blocks:
            return np.ones(tt.size, dtype=bool)  # non-LOS costs dB in the link, not visibility
        sat = passes.sat[pid]
        z = los_mod.draw_innovations(self.seed, sat, grid_index)
        x = los_mod.latent_process(z, is_first, self.rho)
        # passes that continue from the previous chunk resume their latent state
        cont = np.flatnonzero(is_first & (passes.start_cause[pid] == 3))
        ends = np.flatnonzero(np.concatenate([pid[1:] != pid[:-1], [True]]))
        for k in cont:
            s = int(sat[k])
            if s in self._carry:
                e = ends[np.searchsorted(ends, k)]
                x[k:e + 1] = los_mod.latent_process(z[k:e + 1], np.zeros(e + 1 - k, bool),
                                                    self.rho, self._carry[s])
        for e in ends:
            if passes.end_cause[pid[e]] == 3:
                self._carry[int(sat[e])] = float(x[e])
        return los_mod.is_los(self.environment, elevation_deg, x)


def build_site(params: dict[str, Any], scen, index: int, warn: Callable[[str], None]) -> Site:
    """The geometry-layer view of one checked ``[[terminal]]`` table."""
    duration = float(scen.scenario["duration_s"])
    seed = scen.seed
    drive = params["drive"]
    canyon_params = params["canyon"]
    earth = scen.scenario.get("earth", "wgs84")
    if params["track"] is not None:
        motion = Track.from_csv(params["track"], scen.epoch, duration,
                                params["track_max_speed_m_s"], warn, earth)
    elif drive is not None:
        heading = drive["heading_deg"]
        if heading is None:
            heading = canyon_params["azimuth_deg"] if canyon_params is not None else 0.0
        motion = Drive(params["lat_deg"], params["lon_deg"], params["alt_m"], drive["speed_m_s"],
                       heading, duration, drive["start_m"], earth)
        if canyon_params is not None:
            reverse = abs(((heading - canyon_params["azimuth_deg"]) % 360.0) - 180.0) < 1e-6
            motion.direction = -1.0 if reverse else 1.0
    else:
        motion = Static(params["lat_deg"], params["lon_deg"], params["alt_m"], earth)
    obstructions = []
    if params["mask"] is not None:
        obstructions.append(HorizonMask.from_csv(params["mask"]))
    if canyon_params is not None:
        along = motion.along_m(np.array([0.0, duration]))
        if drive is not None and getattr(motion, "direction", 1.0) < 0:
            along = 2 * drive["start_m"] - along
        rng = (float(along.min()), float(along.max()))
        canyon = canyon_mod.Canyon(canyon_params, seed_for(seed, "canyon", index,
                                                           canyon_params["seed"]),
                                   rng if drive is not None else None)
        obstructions.append(CanyonObstruction(canyon, _StreetPosition(motion, drive),
                                              params["min_elevation_deg"], drive is not None))
    los = None
    if params["los"] is not None:
        los = LosSettings(params["los"], seed_for(seed, "los", index, params["los"]["seed"]), index)
    return Site(params["name"], index, float(params["min_elevation_deg"]), motion, obstructions,
                los, float(params["mask_step_s"]), params)


class _StreetPosition:
    """Along-street coordinate of a terminal (reversed when it drives against the axis)."""

    def __init__(self, motion, drive):
        self.motion = motion
        self.start = drive["start_m"] if drive is not None else 0.0
        self.sign = getattr(motion, "direction", 1.0)

    def along_m(self, t_s: np.ndarray) -> np.ndarray:
        d = self.motion.along_m(t_s)
        return self.start + self.sign * (d - self.start)

