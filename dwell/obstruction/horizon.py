"""Horizon masks: minimum elevation as a function of azimuth, read from a CSV file.

File format: a header ``azimuth_deg,elevation_deg`` (either order), one point per line, any order
of azimuths in [0, 360] (360 is the same direction as 0).  Interpolation rule: linear in
azimuth between neighbouring points, wrapping around through north; one point means a constant
mask.  A satellite is in view when its elevation exceeds both the terminal's floor and the mask
at its azimuth.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..io.errors import InputError
from .csvfile import read_numeric_csv


class HorizonMask:
    """Piecewise-linear periodic mask; ``elevation_deg(az)`` is vectorised."""

    def __init__(self, azimuth_deg: np.ndarray, elevation_deg: np.ndarray, label: str = "mask"):
        order = np.argsort(azimuth_deg)
        self.azimuth_deg = np.asarray(azimuth_deg, dtype=float)[order]
        self.mask_deg = np.asarray(elevation_deg, dtype=float)[order]
        self.label = label
        # periodic extension makes np.interp wrap through north
        self._az = np.concatenate([self.azimuth_deg - 360.0, self.azimuth_deg,
                                   self.azimuth_deg + 360.0])
        self._el = np.tile(self.mask_deg, 3)
        self.max_deg = float(self.mask_deg.max())

    def elevation_deg(self, azimuth_deg: np.ndarray, t_s: np.ndarray | None = None) -> np.ndarray:
        return np.interp(np.mod(azimuth_deg, 360.0), self._az, self._el)

    @classmethod
    def from_csv(cls, path: str | Path) -> "HorizonMask":
        rows = read_numeric_csv(path, ("azimuth_deg", "elevation_deg"))
        seen: dict[float, int] = {}
        az, el = [], []
        for line, row in rows:
            a, e = float(row["azimuth_deg"]), float(row["elevation_deg"])
            if not 0.0 <= a <= 360.0:
                raise InputError(str(path), f"line {line}, azimuth_deg", a, "must be in 0..360")
            if not -90.0 <= e <= 90.0:
                raise InputError(str(path), f"line {line}, elevation_deg", e, "must be in -90..90")
            key = a % 360.0
            if key in seen:
                raise InputError(str(path), f"line {line}, azimuth_deg", a,
                                 f"duplicate azimuth (also on line {seen[key]}; 360 equals 0)")
            seen[key] = line
            az.append(key)
            el.append(e)
        return cls(np.array(az), np.array(el), label=Path(path).name)

    def to_csv(self, path: str | Path) -> None:
        lines = ["azimuth_deg,elevation_deg"]
        lines += [f"{a:.4f},{e:.4f}" for a, e in zip(self.azimuth_deg, self.mask_deg)]
        Path(path).write_text("\n".join(lines) + "\n")
