"""Exact interval arithmetic on sorted, disjoint [start, end) lists (numpy arrays)."""

from __future__ import annotations

import numpy as np


def union(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Merge possibly overlapping intervals into a sorted disjoint list."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    keep = b > a
    a, b = a[keep], b[keep]
    if a.size == 0:
        return a, b
    order = np.argsort(a, kind="stable")
    a, b = a[order], b[order]
    reach = np.maximum.accumulate(b)
    new = np.concatenate([[True], a[1:] > reach[:-1]])
    starts = a[new]
    ends = np.maximum.reduceat(b, np.flatnonzero(new))
    return starts, ends


def intersect(a1, b1, a2, b2) -> tuple[np.ndarray, np.ndarray]:
    """Intersection of two sorted disjoint lists."""
    if len(a1) == 0 or len(a2) == 0:
        return np.zeros(0), np.zeros(0)
    # every pair that can overlap: for each interval of list 1, the range of list 2 it meets
    lo = np.searchsorted(b2, a1, side="right")
    hi = np.searchsorted(a2, b1, side="left")
    n = np.maximum(hi - lo, 0)
    i1 = np.repeat(np.arange(len(a1)), n)
    i2 = np.arange(n.sum()) - np.repeat(np.cumsum(n) - n, n) + np.repeat(lo, n)
    s = np.maximum(a1[i1], a2[i2])
    e = np.minimum(b1[i1], b2[i2])
    keep = e > s
    return s[keep], e[keep]


def subtract(a1, b1, a2, b2) -> tuple[np.ndarray, np.ndarray]:
    """List 1 minus list 2 (both sorted disjoint)."""
    if len(a1) == 0:
        return np.zeros(0), np.zeros(0)
    lo = min(float(np.min(a1)), float(np.min(a2)) if len(a2) else np.inf)
    hi = max(float(np.max(b1)), float(np.max(b2)) if len(b2) else -np.inf)
    ca, cb = complement(a2, b2, lo, hi)
    return intersect(a1, b1, ca, cb)


def complement(a, b, t0: float, t1: float) -> tuple[np.ndarray, np.ndarray]:
    """[t0, t1) minus a sorted disjoint list."""
    a = np.clip(np.asarray(a, dtype=float), t0, t1)
    b = np.clip(np.asarray(b, dtype=float), t0, t1)
    s = np.concatenate([[t0], b])
    e = np.concatenate([a, [t1]])
    keep = e > s
    return s[keep], e[keep]


def total(a, b) -> float:
    return float(np.sum(np.asarray(b) - np.asarray(a)))


def count_at(starts: np.ndarray, ends: np.ndarray, t: np.ndarray) -> np.ndarray:
    """How many (possibly overlapping) intervals [start, end) contain each instant t."""
    s = np.sort(starts)
    e = np.sort(ends)
    return np.searchsorted(s, t, side="right") - np.searchsorted(e, t, side="right")


def max_overlap(starts: np.ndarray, ends: np.ndarray) -> int:
    """Largest number of intervals open at one instant."""
    if len(starts) == 0:
        return 0
    times = np.concatenate([starts, ends])
    delta = np.concatenate([np.ones(len(starts), int), -np.ones(len(ends), int)])
    order = np.lexsort((delta, times))         # ends before starts at equal times
    return int(np.max(np.cumsum(delta[order])))


def count_before(ref_key: np.ndarray, ref_t: np.ndarray, q_key: np.ndarray, q_t: np.ndarray,
                 *, inclusive: bool) -> np.ndarray:
    """For each query (key, t): how many references with the same key have t_ref <= t
    (``inclusive``) or t_ref < t.  Exact (a lexsort, no float packing of keys and times)."""
    ref_key = np.asarray(ref_key, dtype=np.int64)
    q_key = np.asarray(q_key, dtype=np.int64)
    if ref_key.size == 0 or q_key.size == 0:
        return np.zeros(q_key.size, dtype=np.int64)
    keys = np.concatenate([ref_key, q_key])
    t = np.concatenate([np.asarray(ref_t, dtype=float), np.asarray(q_t, dtype=float)])
    # at equal times references sort first when inclusive (they count), last otherwise
    typ = np.concatenate([np.zeros(ref_key.size, np.int8) if inclusive else np.ones(ref_key.size, np.int8),
                          np.ones(q_key.size, np.int8) if inclusive else np.zeros(q_key.size, np.int8)])
    order = np.lexsort((typ, t, keys))
    is_ref = np.zeros(keys.size, dtype=np.int64)
    is_ref[: ref_key.size] = 1
    cum = np.cumsum(is_ref[order])
    ks = keys[order]
    first = np.concatenate([[True], ks[1:] != ks[:-1]])
    group = np.cumsum(first) - 1
    base = (cum - is_ref[order])[first]          # references before each key group
    count = cum - base[group]
    out = np.empty(keys.size, dtype=np.int64)
    out[order] = count
    return out[ref_key.size:]


def covered_same_key(iv_key, iv_start, iv_end, q_key, q_t) -> np.ndarray:
    """For each query (key, t): is t inside an interval [start, end) with the same key?
    (Intervals of one key must not overlap.)"""
    return (count_before(iv_key, iv_start, q_key, q_t, inclusive=True)
            - count_before(iv_key, iv_end, q_key, q_t, inclusive=True)) > 0


def intersect_same_key(a_key, a_start, a_end, b_key, b_start, b_end
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairwise intersections of intervals a and b that share a key (each list disjoint within
    a key).  Returns (start, end, index into a) of the non-empty pieces."""
    b_key = np.asarray(b_key, dtype=np.int64)
    if b_key.size == 0 or np.size(a_key) == 0:
        z = np.zeros(0)
        return z, z.copy(), np.zeros(0, dtype=np.int64)
    order = np.lexsort((b_start, b_key))
    bk, bs, be = b_key[order], np.asarray(b_start)[order], np.asarray(b_end)[order]
    # first b of each key in the sorted list
    uniq, first_idx = np.unique(bk, return_index=True)
    a_key = np.asarray(a_key, dtype=np.int64)
    pos = np.searchsorted(uniq, a_key)
    pos_ok = (pos < uniq.size) & (uniq[np.minimum(pos, uniq.size - 1)] == a_key)
    block = np.where(pos_ok, first_idx[np.minimum(pos, uniq.size - 1)], 0)
    lo = count_before(bk, be, a_key, a_start, inclusive=True)     # b ending at or before a's start
    hi = count_before(bk, bs, a_key, a_end, inclusive=False)      # b starting before a's end
    n = np.where(pos_ok, np.maximum(hi - lo, 0), 0)
    ia = np.repeat(np.arange(a_key.size), n)
    ib = np.arange(int(n.sum())) - np.repeat(np.cumsum(n) - n, n) + np.repeat(block + lo, n)
    s = np.maximum(np.asarray(a_start)[ia], bs[ib])
    e = np.minimum(np.asarray(a_end)[ia], be[ib])
    keep = e > s
    return s[keep], e[keep], ia[keep]
