"""Walker constellations in T/P/F notation: T satellites in P planes, phasing F.

Plane j has RAAN = offset + j * spread / P (spread 360 deg for delta, 180 deg for star); satellite
k of plane j has mean anomaly k * 360/S + j * F * 360/T with S = T/P (Walker, "Satellite
constellations", J. Br. Interplanet. Soc. 37, 1984).
"""

from __future__ import annotations

from ..io.errors import InputError
from ..io.schema import REQUIRED, between, ge, gt, integer, lt, number
from .base import BuildContext, Satellite, Source, catalogue_number, circular

KEYS = {
    "satellites": integer(REQUIRED, gt(0), doc="T, total satellites"),
    "planes": integer(REQUIRED, gt(0), doc="P, orbit planes"),
    "phasing": integer(0, ge(0), doc="F, relative phasing, 0..P-1"),
    "altitude_km": number(REQUIRED, gt(0), lt(100000),
                          doc="mean altitude above the equatorial radius (WGS-72, 6378.135 km)"),
    "inclination_deg": number(REQUIRED, between(0, 180), doc="orbit inclination, 0..180"),
    "raan_offset_deg": number(0.0, doc="RAAN of the first plane"),
}


def _build(params: dict, ctx: BuildContext, spread_deg: float) -> list[Satellite]:
    t, p, f = params["satellites"], params["planes"], params["phasing"]
    if t % p:
        raise InputError(ctx.source, f"{ctx.where}.satellites", t,
                         f"must be divisible by planes ({p})")
    if not 0 <= f <= p - 1:
        raise InputError(ctx.source, f"{ctx.where}.phasing", f, f"must be between 0 and P-1 = {p - 1}")
    s = t // p
    out = []
    for j in range(p):
        raan = params["raan_offset_deg"] + j * spread_deg / p
        for k in range(s):
            m = k * 360.0 / s + j * f * 360.0 / t
            i = ctx.first_number + len(out)
            out.append(circular(f"{params['name']}-{j + 1:02d}-{k + 1:02d}", params["name"],
                                catalogue_number(i), ctx.epoch_days, params["altitude_km"],
                                params["inclination_deg"], raan, m))
    return out


DELTA = Source(KEYS, lambda p, c: _build(p, c, 360.0))
STAR = Source(KEYS, lambda p, c: _build(p, c, 180.0))
