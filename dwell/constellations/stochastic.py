"""Stochastic-geometry constellations for analytic studies.

- ``isotropic``: every satellite on its own orbit plane with a uniformly random normal, at a
  uniformly random phase.  At any instant the satellites are independent and uniform on the
  shell: a binomial point process, for which mean number in view and the probability of none in
  view have closed forms (see :mod:`dwell.analysis.analytic`).
- ``random-planes``: P uniformly random planes (or of one fixed inclination with random RAANs),
  S satellites each, equally spaced with a random offset or placed uniformly at random.
"""

from __future__ import annotations

import numpy as np

from ..io.schema import (
    REQUIRED,
    Field,
    between,
    gt,
    integer,
    lt,
    number,
    seed as seed_field,
    text,
)
from .base import (
    BuildContext,
    Satellite,
    Source,
    catalogue_number,
    circular,
    uniform_planes,
)

_SEED = seed_field()

ISOTROPIC_KEYS = {
    "satellites": integer(REQUIRED, gt(0), doc="N, satellites"),
    "altitude_km": number(REQUIRED, gt(0), lt(100000), doc="mean altitude above the equator radius"),
    "seed": _SEED,
}

RANDOM_PLANES_KEYS = {
    "planes": integer(REQUIRED, gt(0), doc="P, random orbit planes"),
    "per_plane": integer(REQUIRED, gt(0), doc="S, satellites per plane"),
    "altitude_km": number(REQUIRED, gt(0), lt(100000), doc="mean altitude above the equator radius"),
    "inclination_deg": Field((int, float), None, (between(0, 180),),
                             "fix the inclination (RAANs stay random); default: isotropic planes"),
    "spacing": text("equal", choices=("equal", "random"),
                    doc="equal: S evenly spaced with a random offset; random: uniform phases"),
    "seed": _SEED,
}


def _rng(params: dict, ctx: BuildContext) -> np.random.Generator:
    seed = ctx.seed if params.get("seed") is None else params["seed"]
    # the table index keeps two stochastic tables with one seed independent
    return np.random.default_rng([int(seed), ctx.index])


def _isotropic(params: dict, ctx: BuildContext) -> list[Satellite]:
    rng = _rng(params, ctx)
    n = params["satellites"]
    inc, raan = uniform_planes(rng, n)
    phase = rng.uniform(0.0, 360.0, n)
    return [circular(f"{params['name']}-{i + 1:04d}", params["name"],
                     catalogue_number(ctx.first_number + i), ctx.epoch_days,
                     params["altitude_km"], inc[i], raan[i], phase[i]) for i in range(n)]


def _random_planes(params: dict, ctx: BuildContext) -> list[Satellite]:
    rng = _rng(params, ctx)
    p, s = params["planes"], params["per_plane"]
    inc, raan = uniform_planes(rng, p)
    if params["inclination_deg"] is not None:
        inc = np.full(p, float(params["inclination_deg"]))
    out = []
    for j in range(p):
        if params["spacing"] == "equal":
            phases = rng.uniform(0.0, 360.0) + np.arange(s) * 360.0 / s
        else:
            phases = rng.uniform(0.0, 360.0, s)
        for k in range(s):
            i = ctx.first_number + len(out)
            out.append(circular(f"{params['name']}-{j + 1:02d}-{k + 1:02d}", params["name"],
                                catalogue_number(i), ctx.epoch_days, params["altitude_km"],
                                inc[j], raan[j], phases[k]))
    return out


ISOTROPIC = Source(ISOTROPIC_KEYS, _isotropic, stochastic=True)
RANDOM_PLANES = Source(RANDOM_PLANES_KEYS, _random_planes, stochastic=True)
