"""The deliberately naive reference kernel: one simpy process per (terminal, policy) that wakes
at every measurement instant and evaluates monitoring counters and the policy's per-row
``step`` in plain Python.

It implements the execution model of :mod:`.common` independently of the event kernel and
exists for two things: the benchmark's speed ratio, and tests that the event kernel gives
exactly the same links and handovers.  Cost: one wake-up and one Python pass over the cells in
view per measurement instant.
"""

from __future__ import annotations

import math

import numpy as np
import simpy

from ..policies.base import Decision, Link, Policy, Rows
from ..radio.measure import row_at_or_after
from .common import (PRIORITY, Execution, KernelRun, select_among, serving_in_view,
                     serving_stop, suitable, switch_start, switch_target)
from .rlm import RlmTiming, indications, weak_intervals


class NaiveRun(KernelRun):
    def __init__(self, env: simpy.Environment, policy: Policy, execution: Execution):
        super().__init__(env, policy, execution)
        self._block: Rows | None = None
        self.rlm = RlmTiming.of(self.stream.lp)
        self.process = env.process(self._run())

    def _rows_at(self, k: int) -> tuple[Rows, int]:
        b = self._block
        if b is None or not (b.k0 <= k < b.k0 + b.n):
            b = self._block = self.stream.rows(k, k + self.stream.B)
        return b, k - b.k0

    def _row(self, t_s: float) -> int:
        return row_at_or_after(t_s, self.s.period_s)

    def _run(self):
        s, ex, dt = self.s, self.ex, self.s.period_s
        K = self.stream.K
        k, initial = 0, True
        t_fail = 0.0
        while k < K:
            # ---------------- down: wait for a suitable cell (T311 runs after a failure)
            t_k = k * dt
            yield self.env.timeout(t_k - self.env.now)
            ex.rec.events += 1
            rows, r = self._rows_at(k)
            self.stream.release(k, self)
            ok = suitable(rows, s.q_rxlevmin_dbm, s.q_out_db)[r]
            if not ok.any():
                k += 1
                continue
            col = select_among(self.policy, rows, r, t_k, ok)
            recovered = None if initial else ex.recovery(rows, r, col, t_k, t_fail)
            if initial:
                reason, t_link = "initial", t_k
            elif recovered is not None:
                reason, t_link = recovered[0], t_k + recovered[1]
            else:
                reason, delay = s.back_in_service(t_k, t_fail)
                t_link = t_k + delay
                if reason == "setup":
                    ex.rec.idle.append(t_fail + s.t311_s)
            if t_link >= s.duration_s:
                initial = True                   # nothing pending past the end
                break
            yield self.env.timeout(t_link - self.env.now)
            ex.open_cell(rows, r, col, t_link, reason)
            initial = False
            # ---------------- up: serve links until a failure
            while True:
                outcome = yield from self._serve()
                if outcome is None:
                    return
                kind, t_next, target = outcome
                if kind == "rlf":
                    ex.note_failure(t_next, (ex.link_cell,))
                    ex.close_link(t_next, "failure")
                    ex.rec.failures.append(t_next)
                    k = self._row(t_next)
                    t_fail = t_next
                    break
                if kind == "hof":
                    ex.note_failure(t_next, (ex.link_cell, ex.next_cell[1]))
                    ex.rec.handover_failures.append(t_next)
                    k = self._row(t_next)
                    t_fail = t_next
                    break
                if target is None:
                    return
                ex.open_next(t_next)
        else:
            if not initial and s.went_idle(t_fail):
                ex.rec.idle.append(t_fail + s.t311_s)    # T311 ran out: idle
        self.stream.release(K, self)

    def _early_loss(self, rows: Rows, r: int, early: list[float], losses: list[float], sat: int):
        for e in early:
            losses.remove(e)
            if e >= self.s.duration_s:
                return None
            c = self.policy.select(rows, r, e, exclude=sat)
            if c >= 0:
                return Decision(e, int(rows.sat[r, c]), "loss", rows.k0 + r, int(rows.cell[r, c]))
        return None

    def _serve(self):
        s, ex, dt = self.s, self.ex, self.s.period_s
        sat, cell, t_c = ex.link_sat, ex.link_cell, ex.link_start
        kc = self._row(t_c)
        if kc >= self.stream.K:
            ex.close_link(s.duration_s, "end")
            return None
        e0 = self.stream.window_end_covering(sat, t_c)
        losses = [t_c if e0 is None else e0]      # pending ends of serving windows
        losses_first = losses[0]                  # the serving window covering the start
        first_rows, first_r = self._rows_at(kc) if kc < self.stream.K else (None, 0)
        stop = serving_stop(first_rows, first_r, cell, losses[0]) if first_rows is not None \
            else losses[0]
        link = Link(sat, t_c, t_c + s.min_dwell_s, 0, losses[0], cell=cell, serving_stop_s=stop)
        self.policy.start(link)
        oc = ic = 0
        expiry = None
        weak_from = len(ex.rec.weak)
        win_s = max(self.rlm.evaluation_out_s, self.rlm.evaluation_in_s)
        t_sw = None                               # scheduled switch of an earth-fixed cell
        paused = False                            # a decision was dropped: wait for the link
        prev_nocell = False                       # the previous row had no serving-satellite cell
        sinr_seen: list[tuple[float, float]] = []
        k = kc
        while True:
            t_k = k * dt
            if k >= self.stream.K:
                when, kind, d = s.duration_s, "end", None
                break
            rows, r = self._rows_at(k)
            early = [e for e in losses if e < t_k] if (self.policy.loss_aware and k == kc) else []
            if early:
                # the serving window closed before the link's first measurement: judge the loss
                # now, with the first row's cells (the event kernel does the same)
                d = self._early_loss(rows, r, sorted(early), losses, sat)
                if d is not None:
                    when, kind = d.time_s, "loss"
                    break
            yield self.env.timeout(t_k - self.env.now)
            ex.rec.events += 1
            self.stream.release(kc, self)
            col = -1
            sat_col = -1
            for j in range(rows.sat.shape[1]):
                if rows.cell[r, j] == cell and rows.sat[r, j] >= 0:
                    col = j
                if rows.sat[r, j] == sat:
                    sat_col = j
            measured = col >= 0
            sinr = rows.sinr_db[r, col] if measured else -math.inf
            if measured:
                sinr_seen.append((t_k, float(sinr)))
            # radio link monitoring: every indication instant up to the next row, judged on the
            # quality of the last evaluation window (rows reaching back over it, and the next)
            t_next = (k + 1) * dt
            k_lo = max(kc, k - int(math.ceil(win_s / dt)) - 1)
            near = self.stream.rows(k_lo, k + 2)
            col_near = near.column_of_cell(cell)
            t_from = t_c if k == kc else t_k
            t_to = min(t_next, s.duration_s)
            ex.rec.weak.extend(weak_intervals(near, col_near, t_from, t_to, losses_first,
                                              s.q_out_db))
            for ti, out_i, in_i in zip(*indications(near, col_near, t_from, t_to, t_c,
                                                    losses_first, self.rlm)):
                if out_i:
                    oc, ic = oc + 1, 0
                    if expiry is None and oc >= s.n310 and not s.idle:
                        expiry = float(ti) + s.t310_s
                    if link.release_s > ti:
                        link.release_s = float(ti)    # the guard lifts when the link is lost
                elif in_i:
                    ic, oc = ic + 1, 0
                    if expiry is not None and ic >= s.n311 and ti < expiry and not s.idle:
                        expiry, oc, ic = None, 0, 0
            if s.idle and expiry is None and t_k >= t_c and not (
                    measured and rows.rsrp_dbm[r, col] - s.q_rxlevmin_dbm > 0):
                expiry = t_k              # idle mode: no suitable camped cell (S-criterion)
            if sat_col >= 0 and rows.end_s[r, sat_col] not in losses:
                losses.append(float(rows.end_s[r, sat_col]))
            # inside the first window, the serving satellite's beams stop covering the terminal
            if sat_col < 0 and t_k < losses_first and not prev_nocell and t_k not in losses:
                losses.append(t_k)
            prev_nocell = sat_col < 0 and t_k < losses_first
            events = []
            if paused and serving_in_view(rows, r, sat, t_k):
                paused = False                    # back in view: the policy starts afresh
                self.policy.start(link)
            d = self.policy.step(rows, r, link) if (t_k > ex.decided_at and not paused) else None
            if d is not None and not self.policy.acts_after_loss and \
                    not serving_in_view(rows, rows.row_at(d.time_s), sat, d.time_s):
                d, paused = None, True            # cannot be commanded: dropped
            if d is not None and d.time_s < t_next:
                events.append((d.time_s, PRIORITY["decision"], "decision", d))
            if self.policy.loss_aware:
                for e in sorted(losses):
                    if e >= t_next or e >= s.duration_s:
                        break
                    losses.remove(e)
                    re = max(rows.row_at(e), kc - rows.k0)
                    c = self.policy.select(rows, re, e, exclude=sat)
                    if c >= 0:
                        events.append((e, PRIORITY["loss"], "loss",
                                       Decision(e, int(rows.sat[re, c]), "loss", rows.k0 + re,
                                                int(rows.cell[re, c]))))
                        break
            if t_sw is None and measured:
                t_sw = switch_start(rows, r, col, cell)
            if t_sw is not None and t_k <= t_sw < t_next and t_sw < s.duration_s:
                rows2, r2 = self._rows_at(row_at_or_after(t_sw, dt))
                sw = switch_target(rows2, r2, sat, cell, t_sw)
                rows, r = self._rows_at(k)
                if sw is not None:
                    events.append((t_sw, PRIORITY["switch"], "decision", sw))
            if expiry is not None and expiry < t_next:
                events.append((expiry, PRIORITY["rlf"], "rlf", None))
            if t_next >= s.duration_s or k + 1 >= self.stream.K:
                events.append((s.duration_s, PRIORITY["end"], "end", None))
            if events:
                when, _, kind, d = min(events, key=lambda e: (e[0], e[1]))
                if kind != "end" or when <= t_next:
                    break
            k += 1
        # clip the weak-signal record to the decision instant, as the link's record ends there
        end_rec = min(when, s.duration_s)
        kept = [(a, min(b, end_rec)) for a, b in ex.rec.weak[weak_from:] if a < end_rec]
        del ex.rec.weak[weak_from:]
        ex.rec.weak.extend(kept)
        kept_sinr = [(a, v) for a, v in sinr_seen if a < end_rec]
        if kept_sinr:
            ex.rec.sinr.add(np.array([a for a, _ in kept_sinr]), np.array([v for _, v in kept_sinr]))
        if kind == "end" or when >= s.duration_s:
            yield self.env.timeout(max(0.0, s.duration_s - self.env.now))
            ex.close_link(s.duration_s, "end")
            return None
        yield self.env.timeout(when - self.env.now)
        if kind == "rlf":
            return ("rlf", when, None)
        link_rows = self.stream.rows(kc, k + 1)
        plan = ex.plan_handover(link_rows, d, d.trigger, t_c, losses_first, self.rlm)
        old_end, brk, t_new = plan.old_end, plan.brk, plan.t_new
        if plan.outcome == "too-late":       # the source failed before the terminal left it
            yield self.env.timeout(min(plan.t_end, s.duration_s) - self.env.now)
            return ("rlf", plan.t_end, None) if plan.t_end < s.duration_s else None
        if old_end > when:
            yield self.env.timeout(min(old_end, s.duration_s) - self.env.now)
        if old_end >= s.duration_s:
            ex.close_link(s.duration_s, "end")
            return None
        ex.switch(old_end, brk)
        if plan.outcome == "failure":        # handover failure at T304 expiry
            yield self.env.timeout(min(t_new, s.duration_s) - self.env.now)
            return ("hof", t_new, None) if t_new < s.duration_s else None
        if t_new >= s.duration_s:
            yield self.env.timeout(s.duration_s - self.env.now)
            return ("handover", t_new, None)
        yield self.env.timeout(t_new - self.env.now)
        return ("handover", t_new, ex.next_cell[0])
