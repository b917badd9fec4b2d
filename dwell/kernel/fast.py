"""The event kernel: a simpy process per (terminal, policy) that wakes only at decision
instants (handover, loss, radio link failure, switching done, re-establishment).

Between events the next one is found by vectorised search over the measurement rows: the
policy's ``scan``, radio-link-monitoring runs and the serving satellite's window ends, over a
window of rows that doubles until an event is certain (nothing later in the rows can pre-empt
it).  Cost: O(rows of the link) numpy work per link, a handful of simpy events per handover.
"""

from __future__ import annotations

import math

import numpy as np
import simpy

from ..policies.base import Decision, Link, Policy, first_index
from ..radio.measure import row_at_or_after
from .common import (PRIORITY, Execution, KernelRun, camping_lost_s, cell_switch, first_rlf_s,
                     select_among, serving_in_view, serving_stop, suitable)
from .rlm import RlmTiming, indications, weak_intervals

FIRST_ROWS = 64


class FastRun(KernelRun):
    """One terminal under one policy in the event kernel."""

    def __init__(self, env: simpy.Environment, policy: Policy, execution: Execution):
        super().__init__(env, policy, execution)
        self._n = FIRST_ROWS                  # rows to look at first; adapts to link lengths
        self.rlm = RlmTiming.of(self.stream.lp)
        self.process = env.process(self._run())

    # ---- helpers -------------------------------------------------------------------------------
    def _row(self, t_s: float) -> int:
        return row_at_or_after(t_s, self.s.period_s)

    def _wait_until(self, t_s: float):
        self.ex.rec.events += 1
        return self.env.timeout(max(0.0, t_s - self.env.now))

    # ---- process -------------------------------------------------------------------------------
    def _run(self):
        t, initial = 0.0, True
        while True:
            found = self._acquire(t, initial)
            if found is None:
                if not initial and self.s.went_idle(t):
                    self.ex.rec.idle.append(t + self.s.t311_s)    # T311 ran out: idle
                break
            (sat, cell, beam), t_link, reason = found
            if reason == "setup":
                self.ex.rec.idle.append(t + self.s.t311_s)
            if t_link >= self.s.duration_s:
                break
            yield self._wait_until(t_link)
            self.ex.open_link(sat, t_link, reason, cell, beam)
            initial = False
            while True:
                outcome = yield from self._serve()
                if outcome is None:                 # scenario over
                    return
                kind, t_next, target = outcome
                if kind == "rlf":
                    self.ex.note_failure(t_next, (self.ex.link_cell,))
                    self.ex.close_link(t_next, "failure")
                    self.ex.rec.failures.append(t_next)
                    t = t_next
                    break
                if kind == "hof":
                    self.ex.note_failure(t_next, (self.ex.link_cell, self.ex.next_cell[1]))
                    self.ex.rec.handover_failures.append(t_next)
                    t = t_next
                    break
                if target is None:                  # handover into the scenario's end
                    return
                self.ex.open_next(t_next)
        self.stream.release(self.stream.K, self)

    def _acquire(self, t_from: float, initial: bool):
        """First measurement instant at or after t_from with a suitable cell, and how the link
        comes about: initial access, a prepared CHO candidate, or
        :meth:`RunSettings.back_in_service` (re-establishment, setup, idle-mode selection)."""
        k = self._row(t_from)
        n = FIRST_ROWS
        s = self.s
        while k < self.stream.K:
            rows = self.stream.rows(k, k + n)
            ok = suitable(rows, s.q_rxlevmin_dbm, s.q_out_db)
            hit = np.flatnonzero(ok.any(axis=1))
            if hit.size:
                r = int(hit[0])
                t_r = float(rows.t_s[r])
                col = select_among(self.policy, rows, r, t_r, ok[r])
                recovered = None if initial else self.ex.recovery(rows, r, col, t_r, t_from)
                if initial:
                    reason, delay = "initial", 0.0
                elif recovered is not None:
                    reason, delay = recovered
                else:
                    reason, delay = s.back_in_service(t_r, t_from)
                return (int(rows.sat[r, col]), int(rows.cell[r, col]), int(rows.beam[r, col])), \
                    t_r + delay, reason
            k += rows.n
            self.stream.release(k, self)
            n *= 2
        return None

    def _serve(self):
        """Serve the current link until its next event; returns (kind, when, new satellite)."""
        ex, s = self.ex, self.s
        sat, cell, t_c = ex.link_sat, ex.link_cell, ex.link_start
        kc = self._row(t_c)
        if kc >= self.stream.K:
            ex.close_link(s.duration_s, "end")
            return None
        self.stream.release(kc, self)
        e0 = None
        n = self._n
        while True:
            rows = self.stream.rows(kc, kc + n)
            if e0 is None:
                c0 = first_index(rows.sat[0].tolist(), sat)   # row 0 only, not column_of
                if c0 >= 0 and rows.start_s[0, c0] <= t_c:
                    e0 = float(rows.end_s[0, c0])     # the window open at row kc covers t_c
                else:
                    e0 = self.stream.window_end_covering(sat, t_c)
                    e0 = t_c if e0 is None else e0
            horizon = math.inf if rows.final else float(rows.t_s[-1])
            col = rows.column_of_cell(cell)
            t_i, oos, ins = indications(rows, col, t_c, s.duration_s if rows.final else horizon,
                                        t_c, e0, self.rlm, keep_good=s.n311 + 1, keep_bad=s.n310)
            release = t_c + s.min_dwell_s
            if s.min_dwell_s > 0 and oos.any():
                release = min(release, float(t_i[int(np.argmax(oos))]))
            link = Link(sat, t_c, release, 1 if rows.t_s[0] <= ex.decided_at else 0, e0,
                        cell=cell, serving_stop_s=serving_stop(rows, 0, cell, e0))
            events = []
            d = self._commandable(rows, link, sat)
            if d is not None:
                events.append((d.time_s, PRIORITY["decision"], "decision", d))
            sw = cell_switch(rows, sat, cell, horizon)
            if sw is not None:
                events.append((sw.time_s, PRIORITY["switch"], "decision", sw))
            if self.policy.loss_aware:
                loss = self._loss(rows, rows.column_of(sat), sat, e0, horizon, t_c)
                if loss is not None:
                    events.append((loss.time_s, PRIORITY["loss"], "loss", loss))
            # idle mode: no radio link failure; camping is lost where no cell is suitable
            t_f = camping_lost_s(rows, col, t_c, s.q_rxlevmin_dbm) if s.idle else \
                first_rlf_s(oos, ins, t_i, s.n310, s.n311, s.t310_s)
            if math.isfinite(t_f):
                events.append((t_f, PRIORITY["rlf"], "rlf", None))
            events.append((s.duration_s, PRIORITY["end"], "end", None))
            when, _, kind, d = min(events, key=lambda e: (e[0], e[1]))
            if when <= horizon or rows.final:
                break
            n *= 2
        used = int(math.ceil((min(when, s.duration_s) - t_c) / s.period_s)) + 2
        self._n = int(min(4096, max(32, 2 * used)))
        t_rec = min(when, s.duration_s)
        ex.rec.weak.extend(weak_intervals(rows, col, t_c, t_rec, e0, s.q_out_db))
        ex.record_sinr(rows, col, t_c, t_rec)
        if when >= s.duration_s:
            yield self._wait_until(s.duration_s)
            ex.close_link(s.duration_s, "end")
            return None
        yield self._wait_until(when)
        if kind == "rlf":
            return ("rlf", when, None)
        plan = ex.plan_handover(rows, d, d.trigger, t_c, e0, self.rlm, rlf_s=t_f,
                                rlf_known_until_s=math.inf if rows.final else horizon)
        return (yield from self._execute(plan, when))

    def _execute(self, plan, when: float):
        """Carry out a planned handover (see :class:`dwell.kernel.common.Handover`)."""
        ex, s = self.ex, self.s
        old_end, brk, t_new = plan.old_end, plan.brk, plan.t_new
        if plan.outcome == "too-late":       # the source failed before the terminal left it
            yield self._wait_until(min(plan.t_end, s.duration_s))
            return ("rlf", plan.t_end, None) if plan.t_end < s.duration_s else None
        if old_end > when:
            yield self._wait_until(min(old_end, s.duration_s))   # until the terminal leaves
        if old_end >= s.duration_s:
            ex.close_link(s.duration_s, "end")
            return None
        ex.switch(old_end, brk)
        if plan.outcome == "failure":        # handover failure at T304 expiry
            yield self._wait_until(min(t_new, s.duration_s))
            return ("hof", t_new, None) if t_new < s.duration_s else None
        if t_new >= s.duration_s:
            yield self._wait_until(s.duration_s)
            return ("handover", t_new, None)
        yield self._wait_until(t_new)
        return ("handover", t_new, ex.next_cell[0])

    def _commandable(self, rows, link: Link, sat: int) -> Decision | None:
        """The policy's first decision that can be commanded: one falling while the serving
        satellite is out of view is dropped and the policy starts again from the first row
        with it back in view (see the execution model)."""
        while True:
            d = self.policy.scan(rows, link)
            if d is None or self.policy.acts_after_loss:
                return d
            r = rows.row_at(d.time_s)
            if serving_in_view(rows, r, sat, d.time_s):
                return d
            back = [q for q in range(r + 1, rows.n)
                    if serving_in_view(rows, q, sat, float(rows.t_s[q]))][:1]
            if not back:
                return None
            link.r_start = back[0]

    def _loss(self, rows, col, sat, e0, horizon, t_c) -> Decision | None:
        """First loss of the serving satellite at which another satellite is in view: the end
        of a serving window, or inside the first window the instant its beams stop covering
        the terminal (the first row of each run of rows with none of its cells measured; the
        network knows it from ephemeris and the beam layout)."""
        nocell = (col < 0) & (rows.t_s < e0) & (rows.t_s >= t_c)
        starts = nocell & ~np.concatenate([[False], nocell[:-1]])
        pending = sorted(set(rows.t_s[starts].tolist()) | {e0})
        cover = set(pending) - {e0}
        while pending:
            e = pending.pop(0)
            if e > horizon or e >= self.s.duration_s:
                return None
            r = rows.row_at(e)
            c = self.policy.select(rows, r, e, exclude=sat)
            if c >= 0:
                return Decision(e, int(rows.sat[r, c]), "loss", rows.k0 + r, int(rows.cell[r, c]))
            if e in cover:
                continue
            # nobody in view at that end: try the serving satellite's next window end
            later = np.flatnonzero((col >= 0) & (rows.t_s > e))
            if later.size == 0:
                return None
            nxt = float(rows.end_s[later[0], col[later[0]]])
            if nxt not in pending:
                pending = sorted(pending + [nxt])
        return None
