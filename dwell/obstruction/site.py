"""A terminal as the geometry layer sees it: where it is, what floor and obstructions it has."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from ..orbits.frames import EarthOrientation, rotate_z, site_in_teme


class Obstruction(Protocol):
    """Anything that raises the elevation a satellite needs at an azimuth and instant."""

    max_deg: float

    def elevation_deg(self, azimuth_deg: np.ndarray, t_s: np.ndarray) -> np.ndarray: ...


@dataclass
class Site:
    name: str
    index: int
    floor_deg: float
    motion: Any                                   # obstruction.motion.Static | Track | Drive
    obstructions: list[Obstruction] = field(default_factory=list)
    los: Any = None                               # obstruction.los settings, or None
    mask_step_s: float = 1.0                      # obstruction sampling step inside passes
    params: dict = field(default_factory=dict)    # the checked [[terminal]] table

    @property
    def max_speed_km_s(self) -> float:
        return float(getattr(self.motion, "max_speed_m_s", 0.0)) / 1000.0

    @property
    def sample_step_s(self) -> float:
        """Obstruction sampling step inside passes (the line-of-sight grid when that is on)."""
        return float(self.los.step_s) if self.los is not None else self.mask_step_s

    @property
    def has_obstruction(self) -> bool:
        return bool(self.obstructions) or self.los is not None

    def teme(self, t_s: np.ndarray, earth: EarthOrientation
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """TEME position (km), velocity (km/s) and east/north/up basis at each instant."""
        t_s = np.asarray(t_s, dtype=float)
        r, v, basis = self.motion.ecef(t_s)
        return site_in_teme(r, v, basis, earth.gmst(t_s), earth.rate_rad_s)

    def position_up(self, t_s: np.ndarray, earth: EarthOrientation
                    ) -> tuple[np.ndarray, np.ndarray]:
        """TEME position (km) and up unit vector only: the hot path of pass finding."""
        t_s = np.asarray(t_s, dtype=float)
        r, _, basis = self.motion.ecef(t_s)
        g = earth.gmst(t_s)
        c, s = np.cos(g), np.sin(g)
        return rotate_z(r, c, s), rotate_z(basis[..., 2, :], c, s)

    def azimuth_elevation(self, sat_r_teme: np.ndarray, t_s: np.ndarray, earth: EarthOrientation
                          ) -> tuple[np.ndarray, np.ndarray]:
        """Azimuth and elevation (deg) of TEME satellite positions seen from the site.

        Rotates each satellite position into Earth-fixed axes (one rotation per sample) and
        projects on the site's east/north/up, which for a fixed site are constants."""
        t_s = np.asarray(t_s, dtype=float)
        g = earth.gmst(t_s)
        r_ecef = rotate_z(sat_r_teme, np.cos(g), -np.sin(g))
        site_r, _, basis = self.motion.ecef(t_s)
        rho = r_ecef - site_r
        e = np.einsum("...i,...i->...", rho, basis[..., 0, :])
        n = np.einsum("...i,...i->...", rho, basis[..., 1, :])
        u = np.einsum("...i,...i->...", rho, basis[..., 2, :])
        rng = np.sqrt(e * e + n * n + u * u)
        return (np.mod(np.degrees(np.arctan2(e, n)), 360.0),
                np.degrees(np.arcsin(np.clip(u / rng, -1.0, 1.0))))

    def mask_deg(self, azimuth_deg: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        """Elevation the obstructions demand (-90 where nothing blocks); floor not included."""
        out = np.full(np.shape(azimuth_deg), -90.0)
        for ob in self.obstructions:
            out = np.maximum(out, ob.elevation_deg(azimuth_deg, t_s))
        return out
