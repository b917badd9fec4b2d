"""Conditional handover for NTN (TS 38.331 sections 5.3.5.13 and 5.5.4.15-16, Rel-17):
prepared candidates executed when an execution condition holds.

Conditions (``condition``), combinable with an A3 entering condition (``"t1+a3"``, ``"d1+a3"``):

- ``t1``: time-based.  The network knows from ephemeris when the serving satellite leaves
  (the end of its visibility window ``e``); the condition holds after ``e - t1_lead_s`` and for
  ``t1_duration_s`` (t1-Threshold and duration of event T1: Thresh1 < t <= Thresh1 + duration).
  Its candidates are cells of other satellites.
- ``d1``: distance-based: distance from the terminal to the serving reference location above
  ``d1_serving_km`` + hysteresis and to the candidate's below ``d1_candidate_km`` - hysteresis
  (distanceThreshFromReference1/2, hysteresisLocation of event D1).  The reference location of a
  cell is its beam centre's ground point (moving with an earth-moving beam; the nadir point for
  a single-beam satellite) or, for an earth-fixed cell, the cell centre.
- ``a3``: the A3 entering condition of :mod:`.a3`.

The combined condition must hold for ``time_to_trigger_s`` (with the same sample-and-hold rule
as A3; set it to 0 for a pure time condition).  A candidate counts as prepared once it has been
in view for ``preparation_s``.  Among candidates meeting the condition at the same instant, the
best by ``target`` is taken.  Measurements before the minimum-dwell guard's release are ignored.
"""

from __future__ import annotations

import numpy as np

from ..io.errors import InputError
from ..io.schema import ge, number, text
from . import register
from .a3 import A3_KEYS, TimeToTriggerRule
from .base import Decision, Link, Rows, best_column, held_runs

CONDITIONS = ("t1", "d1", "a3", "t1+a3", "d1+a3")
_TARGET = {"elevation": lambda rows: rows.elevation_deg,
           "rsrp": lambda rows: np.nan_to_num(rows.rsrp_dbm, nan=-np.inf),
           "visibility": lambda rows: rows.end_s}


@register
class ConditionalHandover(TimeToTriggerRule):
    rule = "cho"
    acts_after_loss = True       # the terminal executes a prepared candidate by itself
    KEYS = {
        "condition": text("d1", choices=CONDITIONS, doc="execution condition"),
        "t1_lead_s": number(30.0, ge(0), doc="T1 starts this long before the serving set"),
        "t1_duration_s": number(60.0, ge(0), doc="T1 window length"),
        "d1_serving_km": number(600.0, ge(0), doc="distance to serving reference above this"),
        "d1_candidate_km": number(500.0, ge(0), doc="distance to candidate reference below this"),
        "d1_hysteresis_km": number(10.0, ge(0), doc="location hysteresis"),
        "preparation_s": number(0.0, ge(0), doc="a candidate must be in view this long first"),
        "target": text("elevation", choices=tuple(_TARGET), doc="tie-break among candidates"),
        **{k: v for k, v in A3_KEYS.items()},
    }
    KEYS["time_to_trigger_s"] = number(0.0, ge(0), doc="timeToTrigger of the condition")

    def __init__(self, params, period_s):
        super().__init__(params, period_s)
        self.parts = set(params["condition"].split("+"))

    @classmethod
    def check(cls, params, source, where, warn):
        super().check(params, source, where, warn)
        if "d1" in params["condition"] and \
                params["d1_candidate_km"] - params["d1_hysteresis_km"] <= 0:
            raise InputError(source, f"{where}.d1_candidate_km", params["d1_candidate_km"],
                             "must exceed d1_hysteresis_km")

    def score(self, rows, r):
        return _TARGET[self.params["target"]](rows)[r]

    def _condition(self, rows: Rows, link: Link) -> np.ndarray:
        p = self.params
        col = rows.column_of_cell(link.cell)
        rr = np.arange(rows.n)
        has = col >= 0
        cond = (rows.sat >= 0) & (rows.cell != link.cell)
        if "t1" in self.parts:      # T1 answers the serving satellite's departure: other satellites
            cond &= rows.sat != link.sat
        cond &= (rows.t_s[:, None] - rows.start_s) >= p["preparation_s"]
        cond &= (rows.t_s >= link.release_s)[:, None]
        cond[:link.r_start] = False
        with np.errstate(invalid="ignore"):
            if "a3" in self.parts:
                mp = np.where(has, rows.rsrp_dbm[rr, np.maximum(col, 0)], -np.inf)
                cond &= (rows.rsrp_dbm + p["neighbour_offset_db"] - p["hysteresis_db"]
                         > (mp + p["serving_offset_db"] + p["offset_db"])[:, None])
            if "d1" in self.parts:
                dp = np.where(has, rows.ref_km[rr, np.maximum(col, 0)], np.inf)
                cond &= (dp > p["d1_serving_km"] + p["d1_hysteresis_km"])[:, None]
                cond &= rows.ref_km < p["d1_candidate_km"] - p["d1_hysteresis_km"]
            if "t1" in self.parts:
                t1 = link.serving_end_s - p["t1_lead_s"]
                # TS 38.331 CondEvent T1 (from memory): entering Mt > Thresh1, leaving
                # Mt > Thresh1 + Duration
                cond &= ((rows.t_s > t1) & (rows.t_s <= t1 + p["t1_duration_s"]))[:, None]
        return cond

    def scan(self, rows: Rows, link: Link) -> Decision | None:
        cond = self._condition(rows, link)
        begin = held_runs(cond, rows.win, self.m)
        a, j = np.nonzero(begin)
        if a.size == 0:
            return None
        tau = np.maximum(rows.t_s[a] + self.ttt, rows.t_s[a + self.m])
        ok = tau < rows.end_s[a, j]
        a, j, tau = a[ok], j[ok], tau[ok]
        if a.size == 0:
            return None
        t_ho = float(tau.min())
        cols = j[tau == t_ho]
        r = rows.row_at(t_ho, self.period_s)
        return self._choose(rows, r, cols, t_ho)

    def _choose(self, rows: Rows, r: int, cols: np.ndarray, t_ho: float) -> Decision:
        """Among candidate columns at row r: the best by ``target`` (ties as in
        :func:`dwell.policies.base.best_column`)."""
        ok = np.zeros(rows.sat.shape[1], bool)
        ok[np.asarray(cols, dtype=np.int64)] = True
        c = int(best_column(rows, self.score(rows, r)[None, :], ok[None, :], rows_sel=r)[0])
        return Decision(t_ho, int(rows.sat[r, c]), self.params["condition"], rows.k0 + r,
                        int(rows.cell[r, c]))

    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        # the naive reference: per-cell run counters kept in the link's scratch state
        cond = self._condition_row(rows, r, link)
        runs = link.state.setdefault("runs", {})
        seen, fired = set(), []
        for jj in range(rows.sat.shape[1]):
            if rows.sat[r, jj] < 0 or int(rows.cell[r, jj]) == link.cell:
                continue
            if "t1" in self.parts and rows.sat[r, jj] == link.sat:
                continue
            w = int(rows.win[r, jj])
            seen.add(w)
            if not cond[jj]:
                runs.pop(w, None)
                continue
            k = rows.k0 + r          # absolute row: naive reads rows block by block
            runs.setdefault(w, k)
            if k - runs[w] == self.m:
                tau = max(runs[w] * self.period_s + self.ttt, rows.t_s[r])
                if tau < rows.end_s[r, jj]:
                    fired.append((tau, jj))
        for w in [w for w in runs if w not in seen]:
            del runs[w]
        if not fired:
            return None
        t_ho = min(t for t, _ in fired)
        cols = [jj for t, jj in fired if t == t_ho]
        return self._choose(rows, r, np.array(cols), t_ho)

    def _condition_row(self, rows: Rows, r: int, link: Link) -> np.ndarray:
        # one row of the condition, evaluated by the same formula as the vectorised path
        one = rows.take(r, r + 1)
        sub = Link(link.sat, link.start_s, link.release_s, 0 if r >= link.r_start else 1,
                   link.serving_end_s, link.state, link.cell)
        return self._condition(one, sub)[0]
