"""Radio link monitoring on the TS 38.133 cadence, independent of the simulation's row period.

The serving cell's quality between measurement rows is its SINR interpolated linearly in dB
(held at the last row when the next row no longer measures the cell; minus infinity once its
satellite's window has ended, exactly at the window's end, or where the cell is not measured).
Every ``rlm_indication_s`` (TS 38.133 section 8.1: the indication interval, max(10 ms, the RLM
reference signal period), from memory) the physical layer reports:

- out-of-sync when the quality averaged (in linear units) over the last ``rlm_evaluation_out_s``
  (200 ms for FR1 without DRX, from memory) is below ``q_out_sinr_db``;
- in-sync when the average over the last ``rlm_evaluation_in_s`` (100 ms) is at or above
  ``q_in_sinr_db``; neither in between.

Windows reach back at most to the link's start.  Averages are taken over the window's
indication instants.  Only indications whose windows touch a row interval that is not plainly
good (both ends measured at or above ``q_in``, no window end inside) are computed; the others
are in-sync, since a linear interpolation of two values at or above a threshold stays above it.
Cost: one boolean per indication instant plus a small window average per doubtful one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..policies.base import Rows


@dataclass(frozen=True)
class RlmTiming:
    indication_s: float
    evaluation_out_s: float
    evaluation_in_s: float
    q_out_db: float
    q_in_db: float

    @classmethod
    def of(cls, link_params: dict) -> "RlmTiming":
        return cls(float(link_params["rlm_indication_s"]), float(link_params["rlm_evaluation_out_s"]),
                   float(link_params["rlm_evaluation_in_s"]), float(link_params["q_out_sinr_db"]),
                   float(link_params["q_in_sinr_db"]))


def serving_sinr_db(rows: Rows, col: np.ndarray) -> np.ndarray:
    """The serving cell's SINR per row (-inf where unmeasured), cached with the rows when
    ``col`` is one of their cached columns (the caches hold ``col``, so its identity is safe);
    several monitors read it for each link."""
    key = ("sinr-of", id(col))
    hit = rows._cols.get(key)
    if hit is not None and hit[0] is col:
        return hit[1]
    rr = np.arange(rows.n)
    v = np.where(col >= 0, rows.sinr_db[rr, np.maximum(col, 0)], -np.inf)
    if any(c is col for c in rows._cols.values()):
        rows._cols[key] = (col, v)
    return v


def quality_db(rows: Rows, col: np.ndarray, t: np.ndarray, e0: float) -> np.ndarray:
    """The serving cell's quality (dB) at instants ``t`` (within the rows' span)."""
    t = np.asarray(t, dtype=float)
    v = serving_sinr_db(rows, col)
    k = np.minimum(np.maximum(np.searchsorted(rows.t_s, t, side="right") - 1, 0), rows.n - 1)
    vk = v[k]
    nxt = np.minimum(k + 1, rows.n - 1)
    has_next = k + 1 < rows.n
    vn = np.where(has_next, v[nxt], -np.inf)
    tk, tn = rows.t_s[k], rows.t_s[nxt]
    both = np.isfinite(vk) & np.isfinite(vn) & has_next
    frac = np.where(both, (t - tk) / np.where(tn > tk, tn - tk, 1.0), 0.0)
    with np.errstate(invalid="ignore"):          # masked: -inf ends are held, not mixed
        out = np.where(both, vk + (np.where(both, vn, vk) - vk) * frac, vk)
    # the serving window ended between the row and the instant: nothing to receive
    return np.where((t >= e0) & (tk < e0), -np.inf, out)


def quality_at_db(rows: Rows, cell: int, t: float, e0: float) -> float:
    """:func:`quality_db` of cell ``cell`` at the one instant ``t``: the same arithmetic on two
    rows instead of whole-row arrays (the kernel asks this once per handover)."""
    n = rows.n
    k = rows.row_at(t)
    c = rows.cell_column_at(k, cell)
    vk = float(rows.sinr_db[k, c]) if c >= 0 else -math.inf
    vn = -math.inf
    if k + 1 < n:
        c1 = rows.cell_column_at(k + 1, cell)
        vn = float(rows.sinr_db[k + 1, c1]) if c1 >= 0 else -math.inf
    tk = float(rows.t_s[k])
    out = vk
    if math.isfinite(vk) and math.isfinite(vn) and k + 1 < n:
        tn = float(rows.t_s[k + 1])
        out = vk + (vn - vk) * ((t - tk) / (tn - tk if tn > tk else 1.0))
    return -math.inf if t >= e0 and tk < e0 else out


def _window_means_db(rows, col, t_i, windows_s: tuple[float, ...], step_s, t_c, e0
                     ) -> list[np.ndarray]:
    """Linear-mean quality over each evaluation window ending at the instants ``t_i`` (one
    array per window length).  The windows share their latest instants, so the quality is
    evaluated once, for the longest, and each window averages its own leading columns."""
    ms = [max(1, int(round(w / step_s))) for w in windows_s]
    back = t_i[:, None] - step_s * np.arange(max(ms))[None, :]
    ok = back >= t_c - 1e-9
    q = quality_db(rows, col, np.maximum(back, t_c).ravel(), e0).reshape(back.shape)
    lin = np.where(ok & np.isfinite(q), 10.0 ** (np.where(np.isfinite(q), q, 0.0) / 10.0), 0.0)
    out = []
    for m in ms:
        # contiguous copies: each sum runs over exactly the array a window of m would build
        part = np.ascontiguousarray(lin[:, :m])
        n_ok = np.ascontiguousarray(ok[:, :m]).sum(axis=1)
        with np.errstate(divide="ignore"):
            out.append(10.0 * np.log10(part.sum(axis=1) / np.maximum(n_ok, 1)))
    return out


def indications(rows: Rows, col: np.ndarray, t_from: float, t_to: float, t_c: float, e0: float,
                timing: RlmTiming, keep_good: int | None = None,
                keep_bad: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Indication instants in [t_from, t_to) (multiples of the interval) and their
    out-of-sync and in-sync flags, for the link that started at ``t_c`` on the serving
    column ``col`` of ``rows``.

    With ``keep_good = n`` only the first n instants of each stretch of plainly good ones are
    returned (all in-sync): enough for N310/N311/T310 (a stretch of n >= N311 in-sync
    indications stops T310 and resets the counts as the whole stretch would), and it never
    materialises the whole grid of a long link.  With ``keep_bad = n`` as well (n >= N310),
    only the first n instants of each stretch that is plainly out-of-sync (the whole window
    where the cell is unmeasured, as past a window's end) are returned: T310 starts within
    them and nothing later in the stretch can stop it."""
    T = timing.indication_s
    i0 = math.ceil(t_from / T - 1e-9)
    i1 = max(i0, math.ceil(t_to / T - 1e-9))
    if i1 == i0:
        z = np.zeros(0)
        return z, np.zeros(0, bool), np.zeros(0, bool)
    v = serving_sinr_db(rows, col)
    # row interval k = [t_k, t_(k+1)) is plainly good if both ends are measured >= q_in and no
    # window end falls inside; the last row's interval is good only if that row is
    good = np.isfinite(v) & (v >= timing.q_in_db)
    # every interval is plainly good exactly when every row is and the window outlasts the
    # rows (then no window end falls inside any interval).  Then nothing is doubtful (most
    # calls: the link ends before its window does): every instant is in-sync, and only the
    # first keep_good of them are asked for
    if float(rows.t_s[-1]) < e0 and good.all():
        idx = np.arange(i0, i1 if keep_good is None else min(i1, i0 + keep_good))
        return idx * T, np.zeros(idx.size, bool), np.ones(idx.size, bool)
    interval_good = good.copy()
    interval_good[:-1] &= good[1:]
    interval_good[:-1] &= ~((rows.t_s[:-1] < e0) & (e0 <= rows.t_s[1:]))
    interval_good &= rows.t_s < e0
    w = max(timing.evaluation_out_s, timing.evaluation_in_s)
    # instants whose windows touch a doubtful interval: [t_k, t_(k+1) + w) for each bad k
    bad = np.flatnonzero(~interval_good)
    ends = np.append(rows.t_s[1:], np.inf)
    lo = np.ceil(rows.t_s[bad] / T - 1e-9)
    hi = np.ceil((np.minimum(ends[bad], t_to) + w) / T - 1e-9)
    # np.minimum/maximum, not np.clip: the same values without clip's per-call overhead
    # (this runs once per policy scan)
    lo = np.minimum(np.maximum(lo, i0), i1).astype(np.int64)
    hi = np.minimum(np.maximum(hi, i0), i1).astype(np.int64)
    if keep_good is None:
        idx = np.arange(i0, i1)
        doubt = np.zeros(idx.size, bool)
        for a, b in zip(lo.tolist(), hi.tolist()):
            doubt[a - i0:b - i0] = True
    else:
        # merge the doubtful ranges; keep the first keep_good instants of every gap
        order = np.argsort(lo, kind="stable")
        lo, hi = lo[order], hi[order]
        keep = hi > lo
        lo, hi = lo[keep], hi[keep]
        if lo.size:
            reach = np.maximum.accumulate(hi)
            new = np.concatenate([[True], lo[1:] > reach[:-1]])
            lo, hi = lo[new], np.maximum.reduceat(hi, np.flatnonzero(new))
        gap_lo = np.concatenate([[i0], hi])
        gap_hi = np.concatenate([lo, [i1]])
        gap_hi = np.minimum(gap_hi, gap_lo + keep_good)
        if keep_bad is not None:
            lo, hi = _subtract(lo, hi, _dead_spans(rows, v, T, w, keep_bad))
        parts = [np.arange(a, b) for a, b in zip(lo.tolist(), hi.tolist())]
        parts += [np.arange(a, b) for a, b in zip(gap_lo.tolist(), gap_hi.tolist()) if b > a]
        # the doubtful ranges are merged and the gaps lie between them: all disjoint, so a
        # sort gives the union (np.unique would hash every instant for nothing)
        idx = np.sort(np.concatenate(parts)) if parts else np.zeros(0, np.int64)
        doubt = np.zeros(idx.size, bool)
        for a, b in zip(lo.tolist(), hi.tolist()):
            doubt[np.searchsorted(idx, a):np.searchsorted(idx, b)] = True
    t_i = idx * T
    oos = np.zeros(t_i.size, bool)
    ins = np.ones(t_i.size, bool)
    d = np.flatnonzero(doubt)
    if d.size:
        # instants whose whole evaluation window lies in a stretch of rows where the cell is
        # not measured (quality minus infinity, held) are out-of-sync, not in-sync, without
        # averaging: the bulk of the doubtful instants past a window's end
        dead = ~np.isfinite(v)
        rr = np.arange(rows.n)
        first = np.maximum.accumulate(np.where(~dead, rr, -1)) + 1    # stretch's first row
        k = np.minimum(np.maximum(np.searchsorted(rows.t_s, t_i[d], side="right") - 1, 0), rows.n - 1)
        m = max(1, int(round(max(timing.evaluation_out_s, timing.evaluation_in_s) / T)))
        w_start = np.maximum(t_i[d] - T * (m - 1), t_c)
        gone = dead[k] & (w_start >= rows.t_s[np.minimum(first[k], rows.n - 1)] + 1e-9)
        oos[d[gone]] = True
        ins[d[gone]] = False
        d = d[~gone]
    if d.size:
        out_db, in_db = _window_means_db(rows, col, t_i[d], (timing.evaluation_out_s,
                                                            timing.evaluation_in_s), T, t_c, e0)
        oos[d] = out_db < timing.q_out_db
        ins[d] = in_db >= timing.q_in_db
    return t_i, oos, ins


def _dead_spans(rows: Rows, v: np.ndarray, step_s: float, window_s: float,
                keep: int) -> list[tuple[int, int]]:
    """Indication-index ranges lying wholly (with their evaluation window) in a stretch of
    rows where the cell is unmeasured, less the first ``keep`` instants of each (a margin of
    one instant at both ends against rounding)."""
    dead = ~np.isfinite(v)
    if not dead.any():
        return []
    edge = np.diff(np.concatenate([[0], dead.astype(np.int8), [0]]))
    r0, r1 = np.flatnonzero(edge == 1), np.flatnonzero(edge == -1)
    m = max(1, int(round(window_s / step_s)))
    out = []
    for a_row, b_row in zip(r0.tolist(), r1.tolist()):
        ts = float(rows.t_s[a_row])
        a = math.ceil(ts / step_s) + m + 1 + keep
        b = math.ceil(float(rows.t_s[b_row]) / step_s) - 1 if b_row < rows.n else 2 ** 62
        if b > a:
            out.append((a, b))
    return out


def _subtract(lo: np.ndarray, hi: np.ndarray, cut: list[tuple[int, int]]
              ) -> tuple[np.ndarray, np.ndarray]:
    """Disjoint sorted ranges [lo, hi) less the ranges ``cut``."""
    if not cut or lo.size == 0:
        return lo, hi
    out_lo, out_hi = [], []
    for a, b in zip(lo.tolist(), hi.tolist()):
        pieces = [(a, b)]
        for c, d in cut:
            if d <= a or c >= b:
                continue
            nxt = []
            for x, y in pieces:
                if c > x:
                    nxt.append((x, min(y, c)))
                if d < y:
                    nxt.append((max(x, d), y))
            pieces = [(x, y) for x, y in nxt if y > x]
        for x, y in pieces:
            out_lo.append(x)
            out_hi.append(y)
    return np.array(out_lo, dtype=np.int64), np.array(out_hi, dtype=np.int64)


def weak_intervals(rows: Rows, col: np.ndarray, t_from: float, t_to: float, e0: float,
                   q_out_db: float) -> list[tuple[float, float]]:
    """Where the serving satellite is in view but its cell's quality is below ``q_out_db``
    (unmeasured included), within [t_from, t_to): exact crossings of the interpolated quality,
    so the outage it causes does not depend on the row period."""
    v = serving_sinr_db(rows, col)
    if np.all(v >= q_out_db):       # measured and at or above q_out everywhere: none (the
        return []                   # general pass below finds none either, row by row)
    out: list[tuple[float, float]] = []
    n = rows.n
    t = rows.t_s
    v_next = np.append(v[1:], -np.inf)
    cand = (t < t_to) & (np.append(t[1:], np.inf) > t_from)
    cand &= ~np.isfinite(v) | (v < q_out_db) | (v_next < q_out_db)    # something below q_out
    for k in np.flatnonzero(cand).tolist():
        a, b = float(t[k]), float(t[k + 1]) if k + 1 < n else math.inf
        vk = float(v[k])
        vn = float(v[k + 1]) if k + 1 < n else -math.inf
        if not math.isfinite(vk):
            if a < e0:                          # in view, cell not measured
                seg = (a, min(b, e0))
            else:
                continue
        elif k + 1 < n and math.isfinite(vn) and not (a < e0 < b):
            if vk < q_out_db and vn < q_out_db:
                seg = (a, b)
            elif vk < q_out_db <= vn:
                seg = (a, a + (q_out_db - vk) / (vn - vk) * (b - a))
            elif vk >= q_out_db > vn:
                seg = (a + (q_out_db - vk) / (vn - vk) * (b - a), b)
            else:
                continue
        else:                                   # held at the row's value up to the window end
            if vk < q_out_db:
                seg = (a, min(b, e0) if a < e0 else b)
            else:
                continue
        lo, hi = max(seg[0], t_from), min(seg[1], t_to)
        if hi > lo:
            if out and abs(out[-1][1] - lo) < 1e-12:
                out[-1] = (out[-1][0], hi)
            else:
                out.append((lo, hi))
    return out
