"""Where a terminal is over time: fixed, following a track file, or driving a straight street.

Every motion answers ``geodetic(t_s) -> (lat_deg, lon_deg, alt_m)`` and
``ecef(t_s) -> (position_km, velocity_km_s, basis)`` vectorised over times; geometry uses the
terminal's position at each instant.  ``earth`` (``[scenario] earth``) places the coordinates on
the WGS-84 ellipsoid (default) or on the 6371 km sphere (:func:`dwell.orbits.frames.site_to_ecef_km`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..io.errors import InputError
from ..orbits.frames import MEAN_EARTH_RADIUS_KM, enu_basis, site_to_ecef_km
from ..orbits.timebase import Epoch, parse_utc
from .csvfile import read_numeric_csv


class Static:
    """A fixed terminal."""

    max_speed_m_s = 0.0

    def __init__(self, lat_deg: float, lon_deg: float, alt_m: float, earth: str = "wgs84"):
        self.lat_deg, self.lon_deg, self.alt_m = float(lat_deg), float(lon_deg), float(alt_m)
        self.earth = earth
        self._r = site_to_ecef_km(self.lat_deg, self.lon_deg, self.alt_m, earth)
        self._basis = enu_basis(self.lat_deg, self.lon_deg)

    def geodetic(self, t_s: np.ndarray):
        t_s = np.asarray(t_s, dtype=float)
        return (np.full(t_s.shape, self.lat_deg), np.full(t_s.shape, self.lon_deg),
                np.full(t_s.shape, self.alt_m))

    def ecef(self, t_s: np.ndarray):
        shape = np.shape(t_s)
        return (np.broadcast_to(self._r, shape + (3,)), np.zeros(shape + (3,)),
                np.broadcast_to(self._basis, shape + (3, 3)))

    def along_m(self, t_s: np.ndarray) -> np.ndarray:
        return np.zeros(np.shape(t_s))


class _Interpolated:
    """Linear interpolation of geodetic coordinates between nodes; held constant outside."""

    def __init__(self, t_s: np.ndarray, lat_deg: np.ndarray, lon_deg: np.ndarray, alt_m: np.ndarray,
                 earth: str = "wgs84"):
        self.earth = earth
        self.t_s = np.asarray(t_s, dtype=float)
        self.lat = np.asarray(lat_deg, dtype=float)
        self.lon = np.unwrap(np.asarray(lon_deg, dtype=float), period=360.0)
        self.alt = np.asarray(alt_m, dtype=float)
        r = site_to_ecef_km(self.lat, self.lon, self.alt, earth)
        if self.t_s.size > 1:
            seg_v = np.diff(r, axis=0) / np.diff(self.t_s)[:, None]
            self.max_speed_m_s = float(np.max(np.linalg.norm(seg_v, axis=1)) * 1000.0)
        else:
            seg_v = np.zeros((0, 3))
            self.max_speed_m_s = 0.0
        self._seg_v = seg_v

    def geodetic(self, t_s: np.ndarray):
        t = np.asarray(t_s, dtype=float)
        lon = np.interp(t, self.t_s, self.lon)
        return (np.interp(t, self.t_s, self.lat), (lon + 180.0) % 360.0 - 180.0,
                np.interp(t, self.t_s, self.alt))

    def ecef(self, t_s: np.ndarray):
        t = np.asarray(t_s, dtype=float)
        lat, lon, alt = self.geodetic(t)
        r = site_to_ecef_km(lat, lon, alt, self.earth)
        if self._seg_v.shape[0]:
            seg = np.clip(np.searchsorted(self.t_s, t, side="right") - 1, 0, self._seg_v.shape[0] - 1)
            inside = (t >= self.t_s[0]) & (t <= self.t_s[-1])
            v = np.where(inside[..., None], self._seg_v[seg], 0.0)
        else:
            v = np.zeros(r.shape)
        return r, v, enu_basis(lat, lon)


class Track(_Interpolated):
    """A terminal following a ``time,lat_deg,lon_deg,alt_m`` CSV (vehicle, train, ship, aircraft).

    ``time`` is either seconds since the scenario start or an ISO-8601 UTC timestamp.  Times must
    increase strictly; no leg may be faster than ``max_speed_m_s``.
    """

    @classmethod
    def from_csv(cls, path: str | Path, epoch: Epoch, duration_s: float,
                 max_speed_m_s: float, warn=print, earth: str = "wgs84") -> "Track":
        rows = read_numeric_csv(path, ("time", "lat_deg", "lon_deg", "alt_m"), text_columns=("time",))
        t, lat, lon, alt, lines = [], [], [], [], []
        for line, row in rows:
            value = row["time"]
            if isinstance(value, str):
                try:
                    value = epoch.seconds_since(parse_utc(value))
                except ValueError as exc:
                    raise InputError(str(path), f"line {line}, time", None, str(exc),
                                     show_value=False) from None
            if not -90.0 <= row["lat_deg"] <= 90.0:
                raise InputError(str(path), f"line {line}, lat_deg", row["lat_deg"], "must be in -90..90")
            if not -180.0 <= row["lon_deg"] <= 360.0:
                raise InputError(str(path), f"line {line}, lon_deg", row["lon_deg"], "must be in -180..360")
            if t and value <= t[-1]:
                raise InputError(str(path), f"line {line}, time", row["time"],
                                 f"times must increase (previous line has {t[-1]:g} s)")
            t.append(float(value))
            lat.append(row["lat_deg"])
            lon.append(row["lon_deg"])
            alt.append(row["alt_m"])
            lines.append(line)
        track = cls(np.array(t), np.array(lat), np.array(lon), np.array(alt), earth)
        if track._seg_v.shape[0]:
            speeds = np.linalg.norm(track._seg_v, axis=1) * 1000.0
            k = int(np.argmax(speeds))
            if speeds[k] > max_speed_m_s:
                raise InputError(str(path), f"line {lines[k + 1]}", f"{speeds[k]:.1f} m/s",
                                 f"jump faster than track_max_speed_m_s = {max_speed_m_s:g}",
                                 show_value=True)
        if t[0] > 0.0 or t[-1] < duration_s:
            warn(f"warning: {path}: track covers {t[0]:g}..{t[-1]:g} s of the scenario's "
                 f"0..{duration_s:g} s; the terminal holds its end positions outside it")
        return track

    def along_m(self, t_s: np.ndarray) -> np.ndarray:
        return np.zeros(np.shape(t_s))


class Drive(_Interpolated):
    """A straight drive at constant speed and heading from the terminal's position.

    The path follows the great circle from the start point on a sphere of the mean Earth radius
    (ample for streets and short runs); ``along_m(t)`` is the distance driven, which a street
    canyon uses to place the terminal among its buildings.
    """

    def __init__(self, lat_deg: float, lon_deg: float, alt_m: float, speed_m_s: float,
                 heading_deg: float, duration_s: float, start_m: float = 0.0,
                 earth: str = "wgs84"):
        self.speed_m_s = float(speed_m_s)
        self.start_m = float(start_m)
        n = max(2, int(np.ceil(duration_s / 60.0)) + 1)  # nodes every <= 60 s: arcs stay straight
        t = np.linspace(0.0, max(duration_s, 1e-9), n)
        d = (self.speed_m_s * t) / 1000.0 / MEAN_EARTH_RADIUS_KM
        lat1, lon1, h = np.radians(lat_deg), np.radians(lon_deg), np.radians(heading_deg)
        lat2 = np.arcsin(np.sin(lat1) * np.cos(d) + np.cos(lat1) * np.sin(d) * np.cos(h))
        lon2 = lon1 + np.arctan2(np.sin(h) * np.sin(d) * np.cos(lat1),
                                 np.cos(d) - np.sin(lat1) * np.sin(lat2))
        super().__init__(t, np.degrees(lat2), np.degrees(lon2), np.full(n, float(alt_m)), earth)

    def along_m(self, t_s: np.ndarray) -> np.ndarray:
        return self.start_m + self.speed_m_s * np.asarray(t_s, dtype=float)

