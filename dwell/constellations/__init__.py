"""Constellation sources: each ``[[constellation]]`` table becomes SGP4 satellite records.

A source is a module with ``KEYS`` (its table spec beyond ``kind``/``name``) and
``build(params, ctx) -> list[Satellite]``.  Several tables combine into one constellation (e.g.
several shells).  To add a source, write a module like ``walker.py`` and list it in ``SOURCES``.
"""

from __future__ import annotations

from . import elements, stochastic, walker
from .base import BuildContext, Constellation, Satellite

SOURCES = {
    "walker-delta": walker.DELTA,
    "walker-star": walker.STAR,
    "tle": elements.TLE,
    "omm": elements.OMM,
    "isotropic": stochastic.ISOTROPIC,
    "random-planes": stochastic.RANDOM_PLANES,
}

__all__ = ["SOURCES", "BuildContext", "Constellation", "Satellite"]
