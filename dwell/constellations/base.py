"""What every constellation source produces: named SGP4 records plus mean orbit facts."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
from sgp4.api import WGS72, Satrec

from ..io.schema import Field

# SGP4 works in WGS-72 (Vallado et al. 2006); generated orbits use the same constants.
MU_KM3_S2 = 398600.8
EQUATORIAL_RADIUS_KM = 6378.135


@dataclass
class Satellite:
    name: str
    satrec: Satrec
    shell: str
    inclination_deg: float
    altitude_km: float        # mean altitude above the equatorial radius
    eccentricity: float = 0.0
    mean_motion_rad_s: float = 0.0
    table: int = 0            # which [[constellation]] table it came from (its beam layout)


@dataclass
class BuildContext:
    """What a source may need besides its own table."""

    source: str               # config file name, for error messages
    where: str                # e.g. "constellation[2]"
    base_dir: Path            # relative paths resolve against the config file's folder
    epoch_days: float         # scenario start, sgp4init epoch (days since 1949-12-31 UTC)
    first_number: int         # catalogue numbers given to generated satellites start here
    seed: int = 0             # scenario seed, for stochastic sources without their own
    index: int = 0            # position of the table among [[constellation]] tables
    warn: Callable[[str], None] = print


@dataclass(frozen=True)
class Source:
    keys: dict[str, Field]
    build: Callable[[dict, BuildContext], list[Satellite]]
    stochastic: bool = False


@dataclass
class Constellation:
    """All satellites of a scenario, in a fixed order (the index used everywhere else)."""

    satellites: list[Satellite] = field(default_factory=list)

    @property
    def names(self) -> list[str]:
        return [s.name for s in self.satellites]

    def __len__(self) -> int:
        return len(self.satellites)

    def shortest_period_s(self) -> float:
        """Shortest anomalistic period, scaled for eccentricity (perigee passage is fastest)."""
        best = math.inf
        for s in self.satellites:
            n = s.satrec.no_kozai / 60.0  # rad/min -> rad/s
            if n > 0:
                best = min(best, 2 * math.pi / n * (1.0 - min(s.eccentricity, 0.95)) ** 1.5)
        return best


def circular_satrec(number: int, epoch_days: float, altitude_km: float, inclination_deg: float,
                    raan_deg: float, mean_anomaly_deg: float) -> Satrec:
    """A circular orbit as an SGP4 record (no drag).

    The mean motion is the Kepler rate for a = R_eq + altitude handed to SGP4 as its (Kozai)
    mean motion; the propagated radius then averages within ~3 km of that and oscillates a few
    km with J2, as a real shell does.
    """
    a = EQUATORIAL_RADIUS_KM + altitude_km
    n_rad_min = math.sqrt(MU_KM3_S2 / a ** 3) * 60.0
    sat = Satrec()
    sat.sgp4init(WGS72, "i", number, epoch_days, 0.0, 0.0, 0.0, 0.0, 0.0,
                 math.radians(inclination_deg), math.radians(mean_anomaly_deg % 360.0),
                 n_rad_min, math.radians(raan_deg % 360.0))
    return sat


def circular(name: str, shell: str, number: int, epoch_days: float, altitude_km: float,
             inclination_deg: float, raan_deg: float, mean_anomaly_deg: float) -> Satellite:
    sat = circular_satrec(number, epoch_days, altitude_km, inclination_deg, raan_deg,
                          mean_anomaly_deg)
    return Satellite(name, sat, shell, float(inclination_deg), float(altitude_km), 0.0,
                     sat.no_kozai / 60.0)


def from_satrec(name: str, shell: str, sat: Satrec) -> Satellite:
    """Wrap a parsed record, deriving its mean altitude from the mean motion."""
    n = sat.no_kozai / 60.0
    a = (MU_KM3_S2 / n ** 2) ** (1.0 / 3.0) if n > 0 else float("nan")
    return Satellite(name, sat, shell, math.degrees(sat.inclo), a - EQUATORIAL_RADIUS_KM,
                     float(sat.ecco), n)


def catalogue_number(i: int) -> int:
    """SGP4 records carry a 5-digit catalogue number; generated ones cycle through 1..99999."""
    return i % 99999 + 1


def uniform_planes(rng: np.random.Generator, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Inclinations and RAANs (deg) of orbit planes whose normals are uniform on the sphere."""
    inc = np.degrees(np.arccos(rng.uniform(-1.0, 1.0, count)))
    raan = rng.uniform(0.0, 360.0, count)
    return inc, raan
