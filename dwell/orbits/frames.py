"""Reference frames: WGS-84 sites, Greenwich sidereal angle, TEME <-> Earth-fixed rotation.

SGP4 positions are in TEME.  We take Earth-fixed = R3(GMST) * TEME with the IAU-1982 GMST
(Vallado, Crawford, Hujsak and Kelso, "Revisiting Spacetrack Report #3", AIAA 2006-6753, eq. for
``gstime``), evaluated on UT1 = UTC + ``ut1_utc_s`` (a constant the scenario may set; with no IERS
table offline it defaults to 0, which moves events by well under 0.1 s).  Polar motion is ignored.

Rather than rotating every satellite sample into Earth-fixed axes, the engine rotates each
terminal's position and east/north/up basis into TEME once per instant: the satellite count is
large, the terminal count small.
"""

from __future__ import annotations

import math

import numpy as np

# WGS-84 ellipsoid (NIMA TR8350.2)
WGS84_A_KM = 6378.137
WGS84_F = 1.0 / 298.257223563
WGS84_E2 = WGS84_F * (2.0 - WGS84_F)
# Earth rotation rate used with GMST-1982 (Vallado 2006, teme2ecef with LOD = 0)
EARTH_RATE_RAD_S = 7.292115146706979e-5
SPEED_OF_LIGHT_KM_S = 299792.458
MEAN_EARTH_RADIUS_KM = 6371.0  # the radius the 3GPP NTN tables use
EARTH_MODELS = ("wgs84", "sphere")  # [scenario] earth: where sites sit and which way is up


def gmst_rad(jd_ut1: np.ndarray, fr_ut1: np.ndarray) -> np.ndarray:
    """IAU-1982 Greenwich mean sidereal angle (rad, 0..2pi) from split UT1 Julian dates."""
    tut1 = ((np.asarray(jd_ut1) - 2451545.0) + np.asarray(fr_ut1)) / 36525.0
    temp = (-6.2e-6 * tut1 ** 3 + 0.093104 * tut1 ** 2
            + (876600.0 * 3600.0 + 8640184.812866) * tut1 + 67310.54841)  # seconds of time
    return np.mod(np.radians(temp / 240.0), 2.0 * np.pi)


def geodetic_to_ecef_km(lat_deg: np.ndarray, lon_deg: np.ndarray, alt_m: np.ndarray) -> np.ndarray:
    """WGS-84 geodetic coordinates to Earth-fixed Cartesian km, shape (..., 3)."""
    lat = np.radians(lat_deg)
    lon = np.radians(lon_deg)
    h = np.asarray(alt_m, dtype=float) / 1000.0
    sl, cl = np.sin(lat), np.cos(lat)
    n = WGS84_A_KM / np.sqrt(1.0 - WGS84_E2 * sl * sl)
    return np.stack([(n + h) * cl * np.cos(lon), (n + h) * cl * np.sin(lon),
                     (n * (1.0 - WGS84_E2) + h) * sl], axis=-1)


def site_to_ecef_km(lat_deg: np.ndarray, lon_deg: np.ndarray, alt_m: np.ndarray,
                    earth: str = "wgs84") -> np.ndarray:
    """A site's Earth-fixed position (km), shape (..., 3), on the scenario's Earth model.

    ``"wgs84"``: geodetic coordinates on the WGS-84 ellipsoid (:func:`geodetic_to_ecef_km`).
    ``"sphere"``: latitude and height on a sphere of radius ``MEAN_EARTH_RADIUS_KM`` (6371 km,
    the radius 3GPP TR 38.821 uses), so the site's up direction is radial and geocentric and
    geodetic latitude coincide; analytic formulas on a sphere then see the simulated geometry.
    :func:`enu_basis` gives the up direction for both (on the sphere the normal is radial).
    """
    if earth == "sphere":
        lat = np.radians(lat_deg)
        lon = np.radians(lon_deg)
        rad = MEAN_EARTH_RADIUS_KM + np.asarray(alt_m, dtype=float) / 1000.0
        return np.stack([rad * np.cos(lat) * np.cos(lon), rad * np.cos(lat) * np.sin(lon),
                         rad * np.sin(lat)], axis=-1)
    if earth != "wgs84":
        raise ValueError(f"unknown Earth model {earth!r} (known: {', '.join(EARTH_MODELS)})")
    return geodetic_to_ecef_km(lat_deg, lon_deg, alt_m)


def enu_basis(lat_deg: np.ndarray, lon_deg: np.ndarray) -> np.ndarray:
    """Earth-fixed unit vectors east, north, up (geodetic normal), shape (..., 3, 3)."""
    lat = np.radians(lat_deg)
    lon = np.radians(lon_deg)
    sl, cl, so, co = np.sin(lat), np.cos(lat), np.sin(lon), np.cos(lon)
    zero = np.zeros_like(sl)
    east = np.stack([-so, co, zero], axis=-1)
    north = np.stack([-sl * co, -sl * so, cl], axis=-1)
    up = np.stack([cl * co, cl * so, sl], axis=-1)
    return np.stack([east, north, up], axis=-2)


def rotate_z(vec: np.ndarray, cos_a: np.ndarray, sin_a: np.ndarray) -> np.ndarray:
    """Rotate (..., 3) vectors by angle a about z, given cos a and sin a broadcastable to vec[..., 0]."""
    out = np.empty(np.broadcast_shapes(vec.shape, np.shape(cos_a) + (3,)))
    x, y = vec[..., 0], vec[..., 1]
    out[..., 0] = cos_a * x - sin_a * y
    out[..., 1] = sin_a * x + cos_a * y
    out[..., 2] = vec[..., 2]
    return out


def ecef_to_teme(vec_ecef: np.ndarray, gmst: np.ndarray) -> np.ndarray:
    """Rotate Earth-fixed vectors into TEME: R3(-gmst).  ``gmst`` broadcasts over ``vec[..., 0]``."""
    return rotate_z(vec_ecef, np.cos(gmst), np.sin(gmst))


def teme_to_ecef(vec_teme: np.ndarray, gmst: np.ndarray) -> np.ndarray:
    """Rotate TEME vectors into Earth-fixed axes: R3(gmst)."""
    return ecef_to_teme(vec_teme, -np.asarray(gmst))


def ecef_to_geodetic(r_km: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Earth-fixed km to WGS-84 (lat_deg, lon_deg, alt_km), Bowring's method (sub-mm in LEO)."""
    x, y, z = r_km[..., 0], r_km[..., 1], r_km[..., 2]
    a, e2 = WGS84_A_KM, WGS84_E2
    b = a * (1.0 - WGS84_F)
    ep2 = (a * a - b * b) / (b * b)
    p = np.hypot(x, y)
    th = np.arctan2(z * a, p * b)
    lat = np.arctan2(z + ep2 * b * np.sin(th) ** 3, p - e2 * a * np.cos(th) ** 3)
    sl, cl = np.sin(lat), np.cos(lat)
    alt = p * cl + z * sl - a * np.sqrt(1.0 - e2 * sl * sl)  # stable at the poles
    return np.degrees(lat), np.degrees(np.arctan2(y, x)), alt


class EarthOrientation:
    """Sidereal angle over scenario time: GMST-1982 on UT1 = UTC + ``ut1_utc_s``.

    With ``rotating=False`` the Earth is frozen at its start orientation (analytic studies of a
    non-rotating Earth); the Earth-fixed frame is then inertial.
    """

    def __init__(self, epoch, ut1_utc_s: float = 0.0, rotating: bool = True):
        self.epoch = epoch
        self.ut1_utc_s = float(ut1_utc_s)
        self.rotating = bool(rotating)
        self.rate_rad_s = EARTH_RATE_RAD_S if rotating else 0.0
        jd, fr = epoch.julian(np.array([self.ut1_utc_s]))
        self._gmst0 = float(gmst_rad(jd, fr)[0])
        # GMST-1982 is linear in time to 1e-10 rad over a year (its T^2 term is 0.093 s per
        # century^2), so one rate from the polynomial's derivative at the start serves the run
        tut1 = ((jd[0] - 2451545.0) + fr[0]) / 36525.0
        dtemp_dt = (876600.0 * 3600.0 + 8640184.812866 + 2 * 0.093104 * tut1
                    - 3 * 6.2e-6 * tut1 ** 2) / (86400.0 * 36525.0)
        self._gmst_rate = math.radians(dtemp_dt / 240.0) if rotating else 0.0

    def gmst(self, t_s: np.ndarray) -> np.ndarray:
        return self._gmst0 + self._gmst_rate * np.asarray(t_s, dtype=float)


def site_in_teme(ecef_km: np.ndarray, ecef_vel_km_s: np.ndarray, basis_ecef: np.ndarray,
                 gmst: np.ndarray, rate_rad_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A site's TEME position, velocity and east/north/up basis at each instant.

    Inputs broadcast over time: ``ecef_km`` and ``ecef_vel_km_s`` (n, 3), ``basis_ecef``
    (n, 3, 3), ``gmst`` (n,).  The velocity adds the Earth-rotation term w x r.
    """
    pos = ecef_to_teme(ecef_km, gmst)
    vel = ecef_to_teme(ecef_vel_km_s, gmst)
    if rate_rad_s:
        vel = vel + rate_rad_s * np.stack([-pos[..., 1], pos[..., 0], np.zeros_like(pos[..., 0])],
                                          axis=-1)
    basis = ecef_to_teme(basis_ecef, gmst[..., None])
    return pos, vel, basis
