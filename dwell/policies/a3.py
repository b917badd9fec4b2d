"""3GPP event A3 with hysteresis and time-to-trigger (TS 38.331 section 5.5.4.4).

Entering condition for neighbour n against the serving (primary) p, in dB of layer-3 filtered
RSRP:  Mn + Ofn + Ocn - Hys > Mp + Ofp + Ocp + Off;  leaving:  Mn + Ofn + Ocn + Hys < Mp + Ofp + Ocp
+ Off.  All satellites share one carrier here, so Ofn = Ofp cancel; Ocn and Ocp are
``neighbour_offset_db`` and ``serving_offset_db``, Off is ``offset_db``, Hys ``hysteresis_db``.

Neighbours are cells: any other beam of any satellite, the serving satellite's included.
A neighbour joins the triggered list when the entering condition holds at every measurement
during ``time_to_trigger_s`` (sample-and-hold between measurements: with period dt it must hold
at floor(TTT/dt)+1 consecutive measurements, and it joins at first-measurement + TTT); it leaves
when the leaving condition holds likewise, when it is no longer measured, or when its window
ends.  The handover goes, at the first instant at or after the minimum-dwell guard's release at
which the list is not empty, to the strongest listed neighbour (Mn + Ocn at the latest
measurement; ties to the lower satellite index, then the lower cell id).  With no guard this is simply the first entry.
When the serving cell is not measured, Mp = -inf: every measured neighbour meets the
entering condition.
"""

from __future__ import annotations

import math

import numpy as np

from ..io.schema import ge, number
from . import register
from .base import TTT_VALUES_MS, Decision, Link, Policy, Rows, held_runs, warn_if_not_in


def ttt_rows(ttt_s: float, period_s: float) -> int:
    """Measurements after the first that fall within the time-to-trigger."""
    return int(math.floor(ttt_s / period_s + 1e-9))


A3_KEYS = {
    "offset_db": number(3.0, doc="a3-Offset (Off)"),
    "hysteresis_db": number(1.0, ge(0), doc="hysteresis (Hys)"),
    "time_to_trigger_s": number(0.32, ge(0), doc="timeToTrigger"),
    "neighbour_offset_db": number(0.0, doc="cell individual offset of neighbours (Ocn)"),
    "serving_offset_db": number(0.0, doc="cell individual offset of the serving cell (Ocp)"),
}


class TimeToTriggerRule(Policy):
    """A rule whose condition must hold for ``time_to_trigger_s`` (sample-and-hold: at
    floor(TTT/dt) + 1 consecutive measurements); warns on values outside the TS 38.331 set."""

    def __init__(self, params, period_s):
        super().__init__(params, period_s)
        self.ttt = float(params["time_to_trigger_s"])
        self.m = ttt_rows(self.ttt, self.period_s)
        self.lookahead_rows = self.m

    @classmethod
    def check(cls, params, source, where, warn):
        super().check(params, source, where, warn)
        warn_if_not_in(params["time_to_trigger_s"], TTT_VALUES_MS, source,
                       f"{where}.time_to_trigger_s", warn)


@register
class EventA3(TimeToTriggerRule):
    rule = "a3"
    KEYS = A3_KEYS

    def __init__(self, params, period_s):
        super().__init__(params, period_s)
        p = params
        self.off, self.hys = float(p["offset_db"]), float(p["hysteresis_db"])
        self.ocn, self.ocp = float(p["neighbour_offset_db"]), float(p["serving_offset_db"])

    def score(self, rows, r):
        return np.nan_to_num(rows.rsrp_dbm[r], nan=-np.inf)

    def expiry(self, t_begin: np.ndarray, t_last: np.ndarray) -> np.ndarray:
        """Timer expiry: first measurement + TTT, never before the last measurement it needs."""
        return np.maximum(t_begin + self.ttt, t_last)

    # ---- vectorised ----------------------------------------------------------------------------
    def _conditions(self, rows: Rows, link: Link):
        col = rows.column_of_cell(link.cell)
        rr = np.arange(rows.n)
        mp = np.where(col >= 0, rows.rsrp_dbm[rr, np.maximum(col, 0)], -np.inf)
        rhs = (mp + self.ocp + self.off)[:, None]
        lhs = rows.rsrp_dbm + self.ocn
        measured = (rows.sat >= 0) & (rows.cell != link.cell)
        measured[:link.r_start] = False
        with np.errstate(invalid="ignore"):
            enter = measured & (lhs - self.hys > rhs)
            leave = measured & (lhs + self.hys < rhs)
        return measured, enter, leave, np.where(measured, lhs, -np.inf)

    def scan(self, rows: Rows, link: Link) -> Decision | None:
        m, n = self.m, rows.n
        if n <= m:
            return None
        col = rows.column_of_cell(link.cell)
        rr = np.arange(n)
        mp = np.where(col >= 0, rows.rsrp_dbm[rr, np.maximum(col, 0)], -np.inf)
        # empty cells hold NaN and compare False; the serving cell is excluded
        enter = (rows.rsrp_dbm + (self.ocn - self.hys) > (mp + self.ocp + self.off)[:, None])
        enter &= rows.cell != link.cell
        enter[:link.r_start] = False
        # held at row a: entering at rows a..a+m within one window.  The first such row of a
        # cell is necessarily where its run started (or the link's first row), so the earliest
        # entry needs no run-start bookkeeping.
        if m == 0:
            held = enter
        else:
            stop = ~enter
            stop[1:] |= rows.win[1:] != rows.win[:-1]
            csum = np.cumsum(stop, axis=0)
            held = enter[: n - m] & (csum[m:] == csum[: n - m])
        tau = np.maximum(rows.t_s[: n - m] + self.ttt, rows.t_s[m:])
        valid = held & (tau[:, None] < rows.end_s[: n - m])
        first = valid.any(axis=1)
        if not first.any():
            return None
        r0 = int(np.argmax(first))
        t_first = float(tau[r0])
        g = link.release_s
        if g <= t_first:
            r = rows.row_at(t_first, self.period_s)     # only the decision's row is read
            lhs_r = np.where(rows.sat[r] >= 0, rows.rsrp_dbm[r] + self.ocn, -np.inf)
            return self._pick_in_row(rows, r, lhs_r, np.flatnonzero(valid[r0]), t_first)
        measured, enter, leave, lhs = self._conditions(rows, link)
        eb = held_runs(enter, rows.win, m)
        eb[: n - m] &= tau[:, None] < rows.end_s[: n - m]      # entries whose window outlasts them
        lb = held_runs(leave, rows.win, m)
        # guard still on at the first entries: the handover goes at the first instant >= g
        # at which some cell is listed.  Each cell's first listing is handled vectorised;
        # cells that left and might re-enter before that instant are followed one by one.
        cols = np.flatnonzero(eb.any(axis=0))
        a1 = np.argmax(eb[:, cols], axis=0)
        w1 = rows.win[a1, cols]
        tau1 = tau[a1]
        end1 = rows.end_s[a1, cols]
        idx = np.arange(n)[:, None]
        after = lb[:, cols] & (idx > (a1 + m)[None, :]) & (rows.win[:, cols] == w1[None, :])
        has_l = after.any(axis=0)
        b1 = np.argmax(after, axis=0)
        lam = np.where(has_l, np.minimum(self.expiry(rows.t_s[b1], rows.t_s[np.minimum(b1 + m, n - 1)]),
                                         end1), end1)
        x = np.maximum(tau1, g)
        listed = x < lam
        best_t = float(x[listed].min()) if listed.any() else math.inf
        best_cells = cols[listed & (x == best_t)].tolist() if listed.any() else []
        # the rest: cells whose first listing ended before the guard (they may re-enter), and
        # later windows in the same columns; only entries not after best_t can matter
        a_all, j_all = np.nonzero(eb)
        listed_w = np.full(rows.sat.shape[1], -2, dtype=np.int64)
        listed_w[cols[listed]] = w1[listed]
        w_all = rows.win[a_all, j_all]
        keep = (listed_w[j_all] != w_all) & (np.maximum(tau[a_all], g) <= best_t)
        cells: dict[tuple[int, int], list] = {}
        for aa, jj, ww in zip(a_all[keep].tolist(), j_all[keep].tolist(), w_all[keep].tolist()):
            cells.setdefault((jj, ww), []).append((aa, float(tau[aa])))
        for (jj, w), entries in cells.items():
            rows_w = np.flatnonzero(rows.win[:, jj] == w)
            end_w = float(rows.end_s[rows_w[0], jj])
            leave_rows = np.flatnonzero(lb[:, jj] & (rows.win[:, jj] == w))
            k_free = -1          # an entry must begin after the last leave's measurements
            for aa, tt in entries:
                if aa <= k_free:
                    continue
                later = leave_rows[leave_rows > aa + m]
                if later.size:
                    b = int(later[0])
                    lam_c = float(self.expiry(rows.t_s[b], rows.t_s[b + m]))
                    lam_c = min(lam_c, end_w)
                else:
                    b, lam_c = n, end_w
                xc = max(tt, g)
                if xc < lam_c:
                    if xc < best_t:
                        best_t, best_cells = xc, [jj]
                    elif xc == best_t:
                        best_cells.append(jj)
                    break
                if b >= n:
                    break
                k_free = b + m
        if not best_cells:
            return None
        return self._pick(rows, lhs, np.array(sorted(set(best_cells))), best_t)

    def _pick(self, rows: Rows, lhs: np.ndarray, cols: np.ndarray, t_ho: float) -> Decision:
        r = rows.row_at(t_ho, self.period_s)
        return self._pick_in_row(rows, r, lhs[r], cols, t_ho)

    def _pick_in_row(self, rows: Rows, r: int, lhs_r: np.ndarray, cols: np.ndarray,
                     t_ho: float) -> Decision:
        """The best of the candidate columns ``cols`` of row r by ``lhs_r`` (that row's
        left-hand sides); ties to the lower satellite, then the lower cell id."""
        # a handful of candidates: plain Python on lists beats a dozen tiny numpy calls
        cand = cols.tolist()
        vals = lhs_r[cols].tolist()
        if any(v != v for v in vals):         # NaN: numpy's ordering, as before
            arr = np.asarray(vals)
            cand = cols[arr == arr.max()].tolist()
        else:
            best = max(vals)
            cand = [c for c, v in zip(cand, vals) if v == best]
        sats = rows.sat[r].tolist()
        low = min(sats[c] for c in cand)
        cand = [c for c in cand if sats[c] == low]
        cells = rows.cell[r].tolist()
        c = min(cand, key=cells.__getitem__)   # the first of equal cell ids, as argmin
        return Decision(t_ho, int(sats[c]), "a3", rows.k0 + r, int(cells[c]))

    # ---- naive reference -----------------------------------------------------------------------
    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        st = link.state.setdefault("cells", {})
        # window id -> [E-run first row, listed, enter time, L-run first row, leave time];
        # rows are absolute indices (naive reads rows block by block)
        k = rows.k0 + r
        dt = self.period_s
        col_p = -1
        for jj in range(rows.sat.shape[1]):
            if rows.cell[r, jj] == link.cell and rows.sat[r, jj] >= 0:
                col_p = jj
        mp = rows.rsrp_dbm[r, col_p] if col_p >= 0 else -math.inf
        rhs = mp + self.ocp + self.off
        seen = set()
        for jj in range(rows.sat.shape[1]):
            s = int(rows.sat[r, jj])
            if s < 0 or int(rows.cell[r, jj]) == link.cell or r < link.r_start:
                continue
            w = int(rows.win[r, jj])
            seen.add(w)
            c = st.setdefault(w, [None, False, None, None, None])
            lhs = rows.rsrp_dbm[r, jj] + self.ocn
            if not c[1]:
                if lhs - self.hys > rhs:
                    if c[0] is None:
                        c[0] = k
                    if k - c[0] == self.m:
                        tau = max(c[0] * dt + self.ttt, rows.t_s[r])
                        if tau < rows.end_s[r, jj]:
                            c[1], c[2], c[3], c[4] = True, tau, None, None
                        c[0] = None
                else:
                    c[0] = None
            else:
                if lhs + self.hys < rhs:
                    if c[3] is None:
                        c[3] = k
                    if k - c[3] == self.m:
                        c[4] = max(c[3] * dt + self.ttt, rows.t_s[r])   # leaves at this instant
                else:
                    c[3] = None
        for w in [w for w in st if w not in seen]:
            del st[w]
        t_next = (k + 1) * dt
        best_t, best = math.inf, []
        for jj in range(rows.sat.shape[1]):
            w = int(rows.win[r, jj])
            if rows.sat[r, jj] < 0 or w not in st or not st[w][1]:
                continue
            c = st[w]
            leave_at = min(rows.end_s[r, jj], c[4] if c[4] is not None else math.inf)
            x = max(c[2], link.release_s)
            if x < leave_at and x < t_next:
                if x < best_t:
                    best_t, best = x, [jj]
                elif x == best_t:
                    best.append(jj)
            if c[4] is not None:      # the leave takes effect once this interval is judged
                c[1], c[3], c[4] = False, None, None
        if not best:
            return None
        top_v = max(rows.rsrp_dbm[r, jj] + self.ocn for jj in best)
        top = [jj for jj in best if rows.rsrp_dbm[r, jj] + self.ocn == top_v]
        jj = min(top, key=lambda q: (rows.sat[r, q], rows.cell[r, q]))
        return Decision(best_t, int(rows.sat[r, jj]), "a3", rows.k0 + r, int(rows.cell[r, jj]))
