"""Geometric (ephemeris-based) rules: highest elevation, shortest range, longest remaining
visibility, and stay-until-lost.

All four know each satellite's predicted window end, so they hand over at the instant the
serving satellite is lost (``loss_aware``).  The first two also switch at any measurement
instant where another satellite is better by more than a hysteresis margin.  On multi-beam
satellites the rules pick a satellite and then its strongest beam (RSRP), and change beam
within the serving satellite when another of its beams is stronger than the serving one by
more than ``beam_hysteresis_db`` (or the serving beam is no longer measured).
"""

from __future__ import annotations

import numpy as np

from ..io.schema import ge, number, text
from . import register
from .base import (Decision, Link, Policy, Rows, best_column, better_than_serving,
                   strongest_of_satellite)

BEAM_KEYS = {"beam_hysteresis_db": number(0.0, ge(0), doc="RSRP margin another beam of the "
                                          "serving satellite needs (multi-beam satellites)")}


class _BeamFollower(Policy):
    """Changing beam within the serving satellite: vectorised and per-row forms."""

    def beam_changes(self, rows: Rows, link: Link) -> np.ndarray:
        """Per row: the column of the serving satellite's beam to change to, or -1."""
        best = strongest_of_satellite(rows, link.sat)
        col = rows.column_of_cell(link.cell)
        rr = np.arange(rows.n)
        rsrp = np.nan_to_num(rows.rsrp_dbm, nan=-np.inf)
        best_v = np.where(best >= 0, rsrp[rr, np.maximum(best, 0)], -np.inf)
        serv_v = np.where(col >= 0, rsrp[rr, np.maximum(col, 0)], -np.inf)
        change = (best >= 0) & (best != col) & (best_v > serv_v + self.beam_margin())
        return np.where(change, best, -1)

    def beam_margin(self) -> float:
        return float(self.params.get("beam_hysteresis_db", 0.0))

    def beam_step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        # naive reference: a plain loop over the cells of one row
        best_c, best_v, serv_v = -1, -np.inf, -np.inf
        for j in range(rows.sat.shape[1]):
            if rows.sat[r, j] != link.sat:
                continue
            v = float(np.nan_to_num(rows.rsrp_dbm[r, j], nan=-np.inf))
            c = int(rows.cell[r, j])
            if c == link.cell:
                serv_v = v
            if best_c < 0 or v > best_v or (v == best_v and c < int(rows.cell[r, best_c])):
                best_c, best_v = j, v
        if best_c >= 0 and int(rows.cell[r, best_c]) != link.cell and \
                best_v > serv_v + self.beam_margin():
            return Decision(float(rows.t_s[r]), link.sat, "beam", rows.k0 + r,
                            int(rows.cell[r, best_c]))
        return None

    def first_beam_change(self, rows: Rows, link: Link, ok_rows: np.ndarray
                          ) -> Decision | None:
        bc = self.beam_changes(rows, link)
        hit = np.flatnonzero((bc >= 0) & ok_rows)
        if hit.size == 0:
            return None
        r = int(hit[0])
        return Decision(float(rows.t_s[r]), link.sat, "beam", rows.k0 + r, int(rows.cell[r, bc[r]]))


class _RowRule(_BeamFollower):
    """Switch at the first measurement instant where the best satellite (or, with
    ``per_cell``, the best cell) beats the serving one."""

    loss_aware = True
    trigger = ""
    margin_key = ""
    per_cell = False          # True: the score ranks cells; False: satellites, then their beam

    def margin(self) -> float:
        return float(self.params[self.margin_key])

    def scan(self, rows: Rows, link: Link) -> Decision | None:
        score = self.score(rows, slice(None))
        ok_rows = rows.t_s >= link.release_s
        ok_rows[:link.r_start] = False
        if self.per_cell:
            col = rows.column_of_cell(link.cell)
            best, beats = better_than_serving(rows, score, col, self.margin())
        else:
            col = rows.column_of(link.sat)
            best, beats = better_than_serving(rows, score, col, self.margin(),
                                              exclude_sat=link.sat)
        hit = np.flatnonzero(beats & ok_rows)
        d_sat = None
        if hit.size:
            r = int(hit[0])
            d_sat = Decision(float(rows.t_s[r]), int(rows.sat[r, best[r]]), self.trigger,
                             rows.k0 + r, int(rows.cell[r, best[r]]))
        if self.per_cell:
            return d_sat
        limit = ok_rows.copy()
        if d_sat is not None:
            limit[d_sat.row - rows.k0:] = False     # the satellite change comes first
        return self.first_beam_change(rows, link, limit) or d_sat

    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        # the naive reference: a plain loop over the cells of one row
        if rows.t_s[r] < link.release_s:
            return None
        score = self.score(rows, r)
        rsrp = np.nan_to_num(rows.rsrp_dbm[r], nan=-np.inf)
        best_j, serving_val = -1, -np.inf
        for j in range(rows.sat.shape[1]):
            s = int(rows.sat[r, j])
            if s < 0:
                continue
            v = float(score[j])
            mine = (int(rows.cell[r, j]) == link.cell) if self.per_cell else (s == link.sat)
            if mine:
                serving_val = max(serving_val, v) if not self.per_cell else v
                if not self.per_cell:
                    continue
            if best_j < 0 or _better(v, s, rsrp[j], int(rows.cell[r, j]), float(score[best_j]),
                                     int(rows.sat[r, best_j]), rsrp[best_j],
                                     int(rows.cell[r, best_j])):
                best_j = j
        if best_j >= 0 and int(rows.cell[r, best_j]) != link.cell and \
                float(score[best_j]) > serving_val + self.margin():
            return Decision(float(rows.t_s[r]), int(rows.sat[r, best_j]), self.trigger,
                            rows.k0 + r, int(rows.cell[r, best_j]))
        if self.per_cell:
            return None
        return self.beam_step(rows, r, link)


def _better(v, s, p, c, bv, bs, bp, bc) -> bool:
    """Is (score v, satellite s, RSRP p, cell c) ahead of the best so far (ties as in
    :func:`dwell.policies.base.best_column`)?"""
    return (v, -s, p, -c) > (bv, -bs, bp, -bc)


@register
class HighestElevation(_RowRule):
    """Serve the satellite highest in the sky; switch when another is higher by more than
    ``hysteresis_deg``."""

    rule = "highest-elevation"
    KEYS = {"hysteresis_deg": number(0.0, ge(0), doc="elevation margin a new satellite needs"),
            **BEAM_KEYS}
    trigger = "elevation"
    margin_key = "hysteresis_deg"

    def score(self, rows, r):
        return rows.elevation_deg[r]


@register
class ShortestRange(_RowRule):
    """Serve the nearest satellite; switch when another is nearer by more than
    ``hysteresis_km``."""

    rule = "shortest-range"
    KEYS = {"hysteresis_km": number(0.0, ge(0), doc="range margin a new satellite needs"),
            **BEAM_KEYS}
    trigger = "range"
    margin_key = "hysteresis_km"

    def score(self, rows, r):
        return -rows.range_km[r]


_THEN = {"elevation": lambda rows, r: rows.elevation_deg[r],
         "range": lambda rows, r: -rows.range_km[r],
         "visibility": lambda rows, r: rows.end_s[r],
         "rsrp": lambda rows, r: np.nan_to_num(rows.rsrp_dbm[r], nan=-np.inf)}


class _LossOnly(_BeamFollower):
    """No satellite change while the serving satellite is in view (only beam changes within
    it); at its loss take the best."""

    loss_aware = True

    def scan(self, rows: Rows, link: Link) -> Decision | None:
        ok_rows = rows.t_s >= link.release_s
        ok_rows[:link.r_start] = False
        return self.first_beam_change(rows, link, ok_rows)

    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        if rows.t_s[r] < link.release_s:
            return None
        return self.beam_step(rows, r, link)


@register
class LongestVisibility(_LossOnly):
    """Take the satellite whose predicted set comes last, and keep it until it is lost (as LEO
    schedulers do with ephemeris)."""

    rule = "longest-visibility"
    KEYS = {**BEAM_KEYS}

    def score(self, rows, r):
        return rows.end_s[r]


@register
class UntilLost(_LossOnly):
    """Stay on the serving satellite until its link is lost, then take the best by ``then``."""

    rule = "until-lost"
    KEYS = {"then": text("elevation", choices=tuple(_THEN), doc="how to choose the next one"),
            **BEAM_KEYS}

    def score(self, rows, r):
        return _THEN[self.params["then"]](rows, r)
