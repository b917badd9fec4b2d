"""Conditional handover for NTN (TS 38.331 sections 5.3.5.13 and 5.5.4.15-16): prepared
candidates executed by the terminal when their execution condition is met.

Conditions (``condition``), each alone or a location/time condition paired with A3:

- ``t1`` (Rel-17 condEventT1): time-based.  The network knows from ephemeris when the serving
  cell stops serving the terminal's area: the end of the serving satellite's floor pass (its
  elevation falls below the terminal's floor; obstructions play no part), or an earth-fixed
  cell's switch to its next satellite, whichever is first, ``e``.  T1 is entered after
  Thresh1 = ``e - t1_lead_s`` and left after Thresh1 + ``t1_duration_s`` (entering Mt > Thresh1,
  leaving Mt > Thresh1 + duration, from memory); it has no time-to-trigger.  Its candidates
  are cells of other satellites.
- ``d1`` (Rel-17 condEventD1): distance from the terminal to the serving cell's reference
  location above ``d1_serving_km`` + hysteresis and to the candidate's below
  ``d1_candidate_km`` - hysteresis (distanceThreshFromReference1/2, hysteresisLocation).
  Rel-17 reference locations are fixed: an earth-fixed cell's centre, or for an earth-moving or
  single-beam cell its reference point (beam centre's ground point) as it was when the terminal
  first measured the cell (fixed at configuration).  For a standing terminal under moving
  beams the distances then do not change, which is why Rel-18 added a moving reference:
- ``d2`` (Rel-18 condEventD2): as d1 with the moving reference (the beam centre's ground point,
  the nadir point for a single-beam satellite) at every instant.
- ``a3``: the A3 entering condition of :mod:`.a3`.

Each condition has its own timer (TS 38.331 5.3.5.13.4: every trigger condition of a
conditional reconfiguration is evaluated as its own event): A3 ``time_to_trigger_s``, D1/D2
``d_time_to_trigger_s`` (default: the same), T1 none.  A paired condition executes at the
first instant at which both are entered (each after its own time-to-trigger, with A3's
sample-and-hold rule).  A candidate counts as prepared once it has been in view for
``preparation_s``.  Among candidates meeting the condition at the same instant, the best by
``target`` is taken.  Measurements before the minimum-dwell guard's release are ignored.
``[scenario] release`` says which conditions the run claims: d2 needs release 18 (a warning
otherwise).
"""

from __future__ import annotations

import math

import numpy as np

from ..io.errors import InputError
from ..io.schema import Field, ge, number, text
from . import register
from .a3 import A3_KEYS, TimeToTriggerRule, ttt_rows
from .base import TTT_VALUES_MS, Decision, Link, Rows, best_column, warn_if_not_in

CONDITIONS = ("t1", "d1", "d2", "a3", "t1+a3", "d1+a3", "d2+a3")
RELEASE_OF = {"d2": 18}            # conditions newer than Rel-17
_TARGET = {"elevation": lambda rows: rows.elevation_deg,
           "rsrp": lambda rows: np.nan_to_num(rows.rsrp_dbm, nan=-np.inf),
           "visibility": lambda rows: rows.end_s}


def _run_start(cond: np.ndarray, win: np.ndarray) -> np.ndarray:
    """Per cell, the first row of the run of ``cond`` (within one cell run) each row is in;
    -1 where ``cond`` is false."""
    n = cond.shape[0]
    same = np.zeros_like(cond)
    same[1:] = win[1:] == win[:-1]
    prev = np.vstack([np.zeros((1,) + cond.shape[1:], bool), cond[:-1]])
    begins = cond & ~(prev & same)
    idx = np.arange(n).reshape((n,) + (1,) * (cond.ndim - 1))
    a = np.maximum.accumulate(np.where(begins, idx, -1), axis=0)
    return np.where(cond, a, -1)


@register
class ConditionalHandover(TimeToTriggerRule):
    rule = "cho"
    acts_after_loss = True       # the terminal executes a prepared candidate by itself
    recovers_by_cho = True       # after a failure, onto a prepared candidate (TS 38.331 5.3.7.3)
    KEYS = {
        "condition": text("d1", choices=CONDITIONS, doc="execution condition"),
        "t1_lead_s": number(30.0, ge(0), doc="T1 starts this long before the serving cell stops"),
        "t1_duration_s": number(60.0, ge(0), doc="T1 window length"),
        "d1_serving_km": number(600.0, ge(0), doc="distance to serving reference above this"),
        "d1_candidate_km": number(500.0, ge(0), doc="distance to candidate reference below this"),
        "d1_hysteresis_km": number(10.0, ge(0), doc="location hysteresis"),
        "d_time_to_trigger_s": Field((int, float), None, (ge(0),),
                                     "timeToTrigger of condEventD1/D2 (default: "
                                     "time_to_trigger_s)"),
        "preparation_s": number(0.0, ge(0), doc="a candidate must be in view this long first"),
        "target": text("elevation", choices=tuple(_TARGET), doc="tie-break among candidates"),
        **{k: v for k, v in A3_KEYS.items()},
    }
    KEYS["time_to_trigger_s"] = number(0.0, ge(0), doc="timeToTrigger of condEventA3 (and of "
                                       "D1/D2 unless d_time_to_trigger_s is given)")

    def __init__(self, params, period_s):
        super().__init__(params, period_s)
        self.parts = set(params["condition"].split("+"))
        d_ttt = params.get("d_time_to_trigger_s")
        self.ttt_d = float(self.ttt if d_ttt is None else d_ttt)
        self.m_d = ttt_rows(self.ttt_d, self.period_s)
        self.lookahead_rows = max(self.m if "a3" in self.parts else 0,
                                  self.m_d if self.parts & {"d1", "d2"} else 0)

    @classmethod
    def check(cls, params, source, where, warn):
        super().check(params, source, where, warn)
        cond = params["condition"]
        if ("d1" in cond or "d2" in cond) and \
                params["d1_candidate_km"] - params["d1_hysteresis_km"] <= 0:
            raise InputError(source, f"{where}.d1_candidate_km", params["d1_candidate_km"],
                             "must exceed d1_hysteresis_km")
        if params.get("d_time_to_trigger_s") is not None:
            warn_if_not_in(params["d_time_to_trigger_s"], TTT_VALUES_MS, source,
                           f"{where}.d_time_to_trigger_s", warn)
        if cond == "t1" and params["time_to_trigger_s"] > 0:
            warn(f"warning: {source}: {where}.time_to_trigger_s = {params['time_to_trigger_s']:g}"
                 " s: condEventT1 has no time-to-trigger (TS 38.331); ignored")

    @staticmethod
    def check_release(params: dict, release: int, source: str, where: str, warn) -> None:
        for part in params["condition"].split("+"):
            need = RELEASE_OF.get(part, 17)
            if release < need:
                warn(f"warning: {source}: {where}.condition = {params['condition']!r}: "
                     f"condEvent{part.upper()} is a Release {need} condition but "
                     f"scenario.release = {release}; used as given")

    @staticmethod
    def check_cell_mode(params: dict, earth_moving: bool, source: str, where: str,
                        warn) -> None:
        """T1 and D1 (Rel-17) are made for earth-fixed cells: with earth-moving beams a
        cell lasts seconds, its fixed D1 reference is where it was first measured (far from
        the terminal) and its stop time comes before T1's lead; say so."""
        parts = set(params["condition"].split("+")) & {"t1", "d1"}
        if earth_moving and parts:
            warn(f"warning: {source}: {where}.condition = {params['condition']!r}: "
                 f"{' and '.join(sorted(p.upper() for p in parts))} suit earth-fixed cells; "
                 "with earth-moving beams they seldom hold (a moving reference is D2, "
                 "release 18)")

    def score(self, rows, r):
        return _TARGET[self.params["target"]](rows)[r]

    # ---- the conditions ------------------------------------------------------------------------
    def _base(self, rows: Rows, link: Link) -> np.ndarray:
        p = self.params
        base = (rows.sat >= 0) & (rows.cell != link.cell)
        if "t1" in self.parts:      # T1 answers the serving satellite's departure: other satellites
            base &= rows.sat != link.sat
        base &= (rows.t_s[:, None] - rows.start_s) >= p["preparation_s"]
        base &= (rows.t_s >= link.release_s)[:, None]
        base[:link.r_start] = False
        return base

    def _measured(self, rows: Rows, link: Link) -> dict[str, np.ndarray]:
        """Each measurement-based condition per (row, cell), without its timer."""
        p = self.params
        col = rows.column_of_cell(link.cell)
        rr = np.arange(rows.n)
        has = col >= 0
        out = {}
        early = np.zeros(rows.n, bool)
        early[:link.r_start] = True
        with np.errstate(invalid="ignore"):
            if "a3" in self.parts:
                mp = np.where(has, rows.rsrp_dbm[rr, np.maximum(col, 0)], -np.inf)
                out["a3"] = (rows.rsrp_dbm + p["neighbour_offset_db"] - p["hysteresis_db"]
                             > (mp + p["serving_offset_db"] + p["offset_db"])[:, None])
            for part in ("d1", "d2"):
                if part in self.parts:
                    ref = self._reference_km(rows, part)
                    dp = np.where(has, ref[rr, np.maximum(col, 0)], np.inf)
                    out["d"] = ((dp > p["d1_serving_km"] + p["d1_hysteresis_km"])[:, None]
                                & (ref < p["d1_candidate_km"] - p["d1_hysteresis_km"]))
        for cond in out.values():               # nothing of the link's rows before r_start
            cond[early] = False
        return out

    @staticmethod
    def _reference_km(rows: Rows, part: str) -> np.ndarray:
        """Distance to each cell's reference location: moving (d2), or fixed (d1): the
        centre of an earth-fixed cell, else where the reference point was when first measured."""
        if part == "d2":
            return rows.ref_km
        from ..radio.cells import is_ground
        return np.where(is_ground(rows.cell), rows.ref_km, rows.ref0_km)

    def t1_threshold(self, link: Link) -> float:
        return link.serving_stop_s - self.params["t1_lead_s"]

    # ---- vectorised ----------------------------------------------------------------------------
    def scan(self, rows: Rows, link: Link) -> Decision | None:
        base = self._base(rows, link)
        t = rows.t_s
        entered = base.copy()
        enter_t = np.where(base, t[np.maximum(_run_start(base, rows.win), 0)], np.inf)
        for name, cond in self._measured(rows, link).items():
            ttt, m = (self.ttt, self.m) if name == "a3" else (self.ttt_d, self.m_d)
            a = _run_start(cond, rows.win)
            ok = cond & (np.arange(rows.n)[:, None] - a >= m)
            e = np.maximum(t[np.maximum(a, 0)] + ttt, t[np.minimum(np.maximum(a, 0) + m, rows.n - 1)])
            entered &= ok
            enter_t = np.maximum(enter_t, np.where(ok, e, np.inf))
        if "t1" in self.parts:
            # T1 is a clock condition: entered at Thresh1 itself, which may fall between rows;
            # the interval from row r to the next one holds it if (Thresh1, Thresh1 + duration]
            # meets it (the measured conditions hold row r's values until the next row)
            th = self.t1_threshold(link)
            t_next = np.append(t[1:], math.inf)
            on = (th < t_next) & (th + self.params["t1_duration_s"] >= t)
            entered &= on[:, None]
            enter_t = np.maximum(enter_t, th)
        # executions: the first row of each run of "all entered", at the latest entering instant
        starts = entered & ~(np.vstack([np.zeros((1, entered.shape[1]), bool), entered[:-1]])
                             & np.vstack([np.zeros((1, entered.shape[1]), bool),
                                          rows.win[1:] == rows.win[:-1]]))
        a, j = np.nonzero(starts)
        if a.size == 0:
            return None
        tau = enter_t[a, j]
        ok = tau < rows.end_s[a, j]
        a, j, tau = a[ok], j[ok], tau[ok]
        if a.size == 0:
            return None
        t_ho = float(tau.min())
        sel = tau == t_ho
        r = int(a[sel].min())                  # chosen at the row where the condition is met
        return self._choose(rows, r, j[sel & (a == r)], t_ho)

    def _choose(self, rows: Rows, r: int, cols: np.ndarray, t_ho: float) -> Decision:
        """Among candidate columns at row r: the best by ``target`` (ties as in
        :func:`dwell.policies.base.best_column`)."""
        ok = np.zeros(rows.sat.shape[1], bool)
        ok[np.asarray(cols, dtype=np.int64)] = True
        c = int(best_column(rows, self.score(rows, r)[None, :], ok[None, :], rows_sel=r)[0])
        return Decision(t_ho, int(rows.sat[r, c]), self.params["condition"], rows.k0 + r,
                        int(rows.cell[r, c]))

    # ---- naive reference -----------------------------------------------------------------------
    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        # per-cell run starts of every condition, kept in the link's scratch state (absolute rows)
        one = rows.take(r, r + 1)
        sub = Link(link.sat, link.start_s, link.release_s, 0 if r >= link.r_start else 1,
                   link.serving_end_s, link.state, link.cell, link.serving_stop_s)
        base = self._base(one, sub)[0]
        conds = {k: v[0] for k, v in self._measured(one, sub).items()}
        runs = link.state.setdefault("runs", {})
        k = rows.k0 + r
        t = float(rows.t_s[r])
        dt = self.period_s
        th = self.t1_threshold(link) if "t1" in self.parts else None
        t1_on = th is None or (th < (k + 1) * dt and th + self.params["t1_duration_s"] >= t)
        fired, seen = [], set()
        for jj in range(rows.sat.shape[1]):
            if rows.sat[r, jj] < 0:
                continue
            w = int(rows.win[r, jj])
            seen.add(w)
            st = runs.setdefault(w, {"base": None, "a3": None, "d": None, "all": False})
            flags = {"base": bool(base[jj]), **{n: bool(c[jj]) for n, c in conds.items()}}
            for name, on in flags.items():
                st[name] = (st[name] if st[name] is not None else k) if on else None
            ok = st["base"] is not None and t1_on
            enter = st["base"] * dt if st["base"] is not None else math.inf
            for name in conds:
                ttt, m = (self.ttt, self.m) if name == "a3" else (self.ttt_d, self.m_d)
                if st[name] is None or k - st[name] < m:
                    ok = False
                    continue
                enter = max(enter, st[name] * dt + ttt, (st[name] + m) * dt)
            if th is not None:
                enter = max(enter, th)
            if ok and not st["all"] and enter < rows.end_s[r, jj]:
                fired.append((enter, jj))
            st["all"] = ok
        for w in [w for w in runs if w not in seen]:
            del runs[w]
        if not fired:
            return None
        t_ho = min(tt for tt, _ in fired)
        cols = [jj for tt, jj in fired if tt == t_ho]
        return self._choose(rows, r, np.array(cols), t_ho)
