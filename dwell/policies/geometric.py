"""Geometric (ephemeris-based) rules: highest elevation, shortest range, longest remaining
visibility, and stay-until-lost.

All four know each satellite's predicted window end, so they hand over at the instant the
serving satellite is lost (``loss_aware``).  The first two also switch at any measurement
instant where another satellite is better by more than a hysteresis margin.
"""

from __future__ import annotations

import numpy as np

from ..io.schema import ge, number, text
from . import register
from .base import Decision, Link, Policy, Rows, better_than_serving


class _RowRule(Policy):
    """Switch at the first measurement instant where the best cell beats the serving one."""

    loss_aware = True
    trigger = ""
    margin_key = ""

    def margin(self) -> float:
        return float(self.params[self.margin_key])

    def scan(self, rows: Rows, link: Link) -> Decision | None:
        col = rows.column_of(link.sat)
        best, beats = better_than_serving(rows, self.score(rows, slice(None)), col, self.margin())
        ok = beats & (rows.t_s >= link.release_s)
        ok[:link.r_start] = False
        hit = np.flatnonzero(ok)
        if hit.size == 0:
            return None
        r = int(hit[0])
        return Decision(float(rows.t_s[r]), int(rows.sat[r, best[r]]), self.trigger, rows.k0 + r)

    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        # the naive reference: a plain loop over the cells of one row
        if rows.t_s[r] < link.release_s:
            return None
        score = self.score(rows, r)
        best_sat, best_val, serving_val = -1, -np.inf, -np.inf
        for j in range(rows.sat.shape[1]):
            s = int(rows.sat[r, j])
            if s < 0:
                continue
            v = float(score[j])
            if s == link.sat:
                serving_val = v
            if v > best_val or (v == best_val and s < best_sat):
                best_sat, best_val = s, v
        if best_sat >= 0 and best_sat != link.sat and best_val > serving_val + self.margin():
            return Decision(float(rows.t_s[r]), best_sat, self.trigger, rows.k0 + r)
        return None


@register
class HighestElevation(_RowRule):
    """Serve the satellite highest in the sky; switch when another is higher by more than
    ``hysteresis_deg``."""

    rule = "highest-elevation"
    KEYS = {"hysteresis_deg": number(0.0, ge(0), doc="elevation margin a new satellite needs")}
    trigger = "elevation"
    margin_key = "hysteresis_deg"

    def score(self, rows, r):
        return rows.elevation_deg[r]


@register
class ShortestRange(_RowRule):
    """Serve the nearest satellite; switch when another is nearer by more than
    ``hysteresis_km``."""

    rule = "shortest-range"
    KEYS = {"hysteresis_km": number(0.0, ge(0), doc="range margin a new satellite needs")}
    trigger = "range"
    margin_key = "hysteresis_km"

    def score(self, rows, r):
        return -rows.range_km[r]


_THEN = {"elevation": lambda rows, r: rows.elevation_deg[r],
         "range": lambda rows, r: -rows.range_km[r],
         "visibility": lambda rows, r: rows.end_s[r],
         "rsrp": lambda rows, r: np.nan_to_num(rows.rsrp_dbm[r], nan=-np.inf)}


class _LossOnly(Policy):
    """No switching while the serving satellite is in view; at its loss take the best."""

    loss_aware = True

    def scan(self, rows: Rows, link: Link) -> Decision | None:
        return None

    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        return None


@register
class LongestVisibility(_LossOnly):
    """Take the satellite whose predicted set comes last, and keep it until it is lost (as LEO
    schedulers do with ephemeris)."""

    rule = "longest-visibility"
    KEYS = {}

    def score(self, rows, r):
        return rows.end_s[r]


@register
class UntilLost(_LossOnly):
    """Stay on the serving satellite until its link is lost, then take the best by ``then``."""

    rule = "until-lost"
    KEYS = {"then": text("elevation", choices=tuple(_THEN), doc="how to choose the next one")}

    def score(self, rows, r):
        return _THEN[self.params["then"]](rows, r)
