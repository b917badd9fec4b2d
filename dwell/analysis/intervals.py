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
