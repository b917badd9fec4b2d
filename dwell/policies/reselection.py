"""Idle-mode cell reselection (TS 38.304 sections 5.2.3.2 and 5.2.4), its own rule family:
``rule = "reselection"``.

A terminal in idle mode is camped on a cell and moves by itself, without signalling:

- **S-criterion** (5.2.3.2): a cell is suitable when Srxlev = Qrxlevmeas - Qrxlevmin > 0
  (``q_rxlevmin_dbm``; offsets and power compensation are taken as zero).  When the camped
  cell stops being suitable, or is lost, the terminal selects the strongest suitable cell at
  once (trigger "selection", or "loss" at the end of the camped satellite's window); when
  no cell is suitable at all the kernels record a camping loss and the terminal camps again,
  by cell selection, once one is (link start reason "cell-selection",
  :meth:`dwell.kernel.common.RunSettings.back_in_service`);
- **when to measure** (5.2.4.2, with the Rel-17 NTN additions): neighbours are measured when
  Srxlev of the camped cell is at or below ``s_intrasearch_p_db`` (not set: always), or when the
  terminal is farther than ``distance_thresh_km`` from the camped cell's reference location
  (distanceThresh), or from ``t_service_lead_s`` before the camped cell stops serving the area
  (t-Service, from ephemeris: the floor-pass end or an earth-fixed cell's switch);
- **R-criterion** (5.2.4.6): Rs = Qmeas,s + Qhyst (``q_hyst_db``), Rn = Qmeas,n - Qoffset
  (``q_offset_db``); the terminal reselects the best-ranked neighbour that is suitable and ranked
  above the camped cell during ``t_reselection_s`` (Treselection), and only after at least 1 s
  camped on the current cell.  Measurements are the layer-3 filtered RSRP of the rows.

Reselection takes effect at the instant it is decided (nothing is signalled); the break is the
terminal's ``interruption_s`` (reading the new cell's system information).  There is no radio
link monitoring in idle mode.  Records: the handover table with trigger "reselection",
"selection" or "loss"; the summary adds reselections and camped time per hour.
"""

from __future__ import annotations

import math

import numpy as np

from ..io.schema import Field, between, ge, number
from . import register
from .a3 import ttt_rows
from .base import Decision, Link, Policy, Rows, best_column, warn_if_not_in

# value sets from the TS 38.331 ASN.1 (from memory): Q-Hyst in dB, T-Reselection 0..7 s
Q_HYST_VALUES_DB = (0, 1, 2, 3, 4, 5, 6, 8, 10, 12, 14, 16, 18, 20, 22, 24)
T_RESELECTION_VALUES_MS = tuple(1000 * s for s in range(8))
MIN_CAMPED_S = 1.0      # TS 38.304 5.2.4.6: more than 1 s camped on the serving cell


def _optional(check, doc: str) -> Field:
    return Field((int, float), None, (check,), doc)


@register
class Reselection(Policy):
    rule = "reselection"
    idle = True              # the kernels run no radio link monitoring and no procedure
    loss_aware = True        # the camped satellite's set is seen at once (no link to fail)
    acts_after_loss = True   # the terminal decides by itself: nothing needs commanding
    KEYS = {
        "q_hyst_db": number(4.0, between(0, 24), doc="Qhyst added to the camped cell's rank "
                            "(TS 38.304 5.2.4.6; 0-24 dB)"),
        "q_offset_db": number(0.0, between(-24, 24), doc="Qoffset(s,n) subtracted from each "
                              "neighbour's rank"),
        "t_reselection_s": number(1.0, between(0, 7), doc="Treselection: the neighbour must "
                                  "rank higher this long (TS 38.331: 0-7 s)"),
        "s_intrasearch_p_db": _optional(between(0, 62), "SIntraSearchP: neighbours are "
                                        "measured only when the camped cell's Srxlev is at or "
                                        "below this (not set: always measured)"),
        "distance_thresh_km": _optional(ge(0), "distanceThresh (NTN): neighbours are also "
                                        "measured when the terminal is farther than this from "
                                        "the camped cell's reference location"),
        "t_service_lead_s": number(10.0, ge(0), doc="neighbours are also measured from this "
                                   "long before the camped cell's t-Service (the instant it "
                                   "stops serving here; illustrative)"),
    }

    def __init__(self, params, period_s):
        super().__init__(params, period_s)
        p = params
        self.q_min = float(p["q_rxlevmin_dbm"])
        self.hyst, self.offset = float(p["q_hyst_db"]), float(p["q_offset_db"])
        self.t_res = float(p["t_reselection_s"])
        self.m = ttt_rows(self.t_res, self.period_s)
        self.lookahead_rows = self.m
        sp, dk = p.get("s_intrasearch_p_db"), p.get("distance_thresh_km")
        self.search_db = math.inf if sp is None else float(sp)
        self.dist_km = None if dk is None else float(dk)
        self.lead_s = float(p["t_service_lead_s"])

    @classmethod
    def check(cls, params, source, where, warn):
        super().check(params, source, where, warn)
        if params["q_hyst_db"] not in Q_HYST_VALUES_DB:
            warn(f"warning: {source}: {where}.q_hyst_db = {params['q_hyst_db']:g} is not in the "
                 f"TS 38.331 value set ({', '.join(map(str, Q_HYST_VALUES_DB))} dB); used as "
                 "given")
        warn_if_not_in(params["t_reselection_s"], T_RESELECTION_VALUES_MS, source,
                       f"{where}.t_reselection_s", warn)

    def score(self, rows, r):
        return np.nan_to_num(rows.rsrp_dbm[r], nan=-np.inf)

    def select(self, rows: Rows, r: int, t_s: float, exclude: int = -1) -> int:
        """The strongest suitable cell of row r in view at t_s (cell selection), or -1."""
        ok = (rows.sat[r] >= 0) & (rows.sat[r] != exclude) & (rows.start_s[r] <= t_s) & \
             (t_s < rows.end_s[r])
        with np.errstate(invalid="ignore"):
            ok &= rows.rsrp_dbm[r] - self.q_min > 0
        if not ok.any():
            return -1
        return int(best_column(rows, self.score(rows, r)[None, :], ok[None, :], rows_sel=r)[0])

    # ---- the conditions, row by row (shared by both kernels) ------------------------------
    def _conditions(self, rows: Rows, link: Link, a: int = 0, b: int | None = None):
        """Rows a..b-1: (serving unsuitable, neighbour ranked above while measured and
        suitable, neighbours' ranks)."""
        b = rows.n if b is None else b
        col = rows.column_of_cell(link.cell)[a:b]
        rr = np.arange(b - a)
        rsrp = rows.rsrp_dbm[a:b]
        t = rows.t_s[a:b]
        served = col >= 0
        qs = np.where(served, rsrp[rr, np.maximum(col, 0)], -np.inf)
        srx = qs - self.q_min
        measure = srx <= self.search_db
        if self.dist_km is not None:
            ref = np.where(served, rows.ref_km[a:b][rr, np.maximum(col, 0)], math.inf)
            measure |= ref > self.dist_km
        measure |= t >= link.serving_stop_s - self.lead_s
        with np.errstate(invalid="ignore"):
            rank = np.nan_to_num(rsrp, nan=-np.inf) - self.offset
            cond = (rows.sat[a:b] >= 0) & (rows.cell[a:b] != link.cell) & \
                (rsrp - self.q_min > 0) & (rank > (qs + self.hyst)[:, None]) & measure[:, None]
        with np.errstate(invalid="ignore"):
            lost = ~(srx > 0)       # unmeasured (out of the beams, or set) or not suitable
        cond[: max(link.r_start - a, 0)] = False
        lost[: max(link.r_start - a, 0)] = False
        return lost, cond, rank

    def _decide(self, rows: Rows, r: int, cols: np.ndarray, rank: np.ndarray, t: float,
                trigger: str) -> Decision:
        ok = np.zeros(rows.sat.shape[1], bool)
        ok[cols] = True
        c = int(best_column(rows, rank[None, :], ok[None, :], rows_sel=r)[0])
        return Decision(t, int(rows.sat[r, c]), trigger, rows.k0 + r, int(rows.cell[r, c]))

    def _selection(self, rows: Rows, r: int, t: float, link: Link) -> Decision | None:
        c = self.select(rows, r, t, exclude=-1)
        if c < 0 or int(rows.cell[r, c]) == link.cell:
            return None
        return Decision(t, int(rows.sat[r, c]), "selection", rows.k0 + r, int(rows.cell[r, c]))

    # ---- vectorised ----------------------------------------------------------------------
    def scan(self, rows: Rows, link: Link) -> Decision | None:
        m, n = self.m, rows.n
        lost, cond, rank = self._conditions(rows, link)
        not_before = link.start_s + MIN_CAMPED_S
        sel = None                                       # the first cell selection, if any
        for r in np.flatnonzero(lost).tolist():          # usually none, or one run
            sel = self._selection(rows, r, float(rows.t_s[r]), link)
            if sel is not None:
                break
        if n > m:
            # held from row a: ranked above at rows a..a+m within one window (sliding, so a
            # decision waits for the 1 s camped rule while the condition still holds)
            stop = ~cond
            stop[1:] |= rows.win[1:] != rows.win[:-1]
            csum = np.cumsum(stop, axis=0)
            held = cond[: n - m] & (csum[m:] == csum[: n - m])
            tau = np.maximum(rows.t_s[: n - m] + self.t_res, rows.t_s[m:])
            valid = held & (tau[:, None] < rows.end_s[m:]) & (tau >= not_before)[:, None]
            valid &= (tau <= rows.certain_until_s)[:, None]
            first = valid.any(axis=1)
            if first.any():
                a = int(np.argmax(first))
                if sel is None or float(tau[a]) < sel.time_s:
                    return self._decide(rows, a + m, np.flatnonzero(valid[a]), rank[a + m],
                                        float(tau[a]), "reselection")
        return sel

    # ---- naive reference -------------------------------------------------------------------
    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        st = link.state.setdefault("runs", {})      # window id -> consecutive rows ranked above
        lost, cond, rank = self._conditions(rows, link, r, r + 1)
        t = float(rows.t_s[r])
        if lost[0]:
            d = self._selection(rows, r, t, link)
            if d is not None:
                return d
        runs = {}
        for jj in np.flatnonzero(cond[0]).tolist():
            w = int(rows.win[r, jj])
            runs[w] = st.get(w, 0) + 1
        link.state["runs"] = runs
        m = self.m
        ready = []
        for jj in np.flatnonzero(cond[0]).tolist():
            if runs[int(rows.win[r, jj])] >= m + 1:
                ready.append(jj)
        if not ready:
            return None
        tau = max((rows.k0 + r - m) * self.period_s + self.t_res, t)
        ok = [jj for jj in ready if tau < rows.end_s[r, jj]]
        if not ok or tau < link.start_s + MIN_CAMPED_S:
            return None
        return self._decide(rows, r, np.array(ok), rank[0], tau, "reselection")
