"""Topocentric look angles: azimuth, elevation, slant range and range rate, vectorised.

Inputs are TEME vectors broadcast over any leading shape (satellites x times x terminals); the
terminal's east/north/up basis is expressed in TEME too (see :func:`dwell.orbits.frames.site_in_teme`),
so "up" is the WGS-84 geodetic normal.
"""

from __future__ import annotations

import numpy as np


def elevation_deg(sat_r: np.ndarray, site_r: np.ndarray, up: np.ndarray) -> np.ndarray:
    """Elevation only (the hot path of pass finding)."""
    rho = sat_r - site_r
    rng = np.sqrt(np.einsum("...i,...i->...", rho, rho))
    return np.degrees(np.arcsin(np.clip(np.einsum("...i,...i->...", rho, up) / rng, -1.0, 1.0)))


def look(sat_r: np.ndarray, sat_v: np.ndarray | None, site_r: np.ndarray, site_v: np.ndarray | None,
         basis: np.ndarray) -> dict[str, np.ndarray]:
    """Azimuth (deg, 0..360 from north through east), elevation (deg), range (km), range rate
    (km/s, positive when receding; needs velocities) and the unit line of sight in TEME."""
    rho = sat_r - site_r
    rng = np.sqrt(np.einsum("...i,...i->...", rho, rho))
    u = rho / rng[..., None]
    east = np.einsum("...i,...i->...", u, basis[..., 0, :])
    north = np.einsum("...i,...i->...", u, basis[..., 1, :])
    upc = np.einsum("...i,...i->...", u, basis[..., 2, :])
    out = {
        "azimuth_deg": np.mod(np.degrees(np.arctan2(east, north)), 360.0),
        "elevation_deg": np.degrees(np.arcsin(np.clip(upc, -1.0, 1.0))),
        "range_km": rng,
        "los": u,
    }
    if sat_v is not None and site_v is not None:
        out["range_rate_km_s"] = np.einsum("...i,...i->...", u, sat_v - site_v)
    return out


def slant_range_km(elevation_deg: np.ndarray, altitude_km: np.ndarray,
                   earth_radius_km: float = 6371.0) -> np.ndarray:
    """Slant range on a spherical Earth: sqrt((R+h)^2 - R^2 cos^2 e) - R sin e."""
    e = np.radians(elevation_deg)
    r = earth_radius_km
    return np.sqrt((r + altitude_km) ** 2 - (r * np.cos(e)) ** 2) - r * np.sin(e)


def earth_central_angle_rad(elevation_deg: np.ndarray, orbit_radius_km: np.ndarray,
                            earth_radius_km: float = 6371.0) -> np.ndarray:
    """Half-angle psi0 of the visibility cap: arccos(R cos e / r) - e (spherical Earth)."""
    e = np.radians(elevation_deg)
    return np.arccos(np.clip(earth_radius_km * np.cos(e) / orbit_radius_km, -1.0, 1.0)) - e
