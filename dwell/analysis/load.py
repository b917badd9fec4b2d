"""Network load: the handovers each satellite and each cell must process, per second.

Every handover of the run (every terminal, listed or generated, weighted by its population
weight: 1 for listed terminals) is an event at the scenario second it falls in
(``floor(time_s)``; calendar seconds of the scenario, not a sliding window) for:

- level ``satellite``: a satellite change counts *into* the new satellite and *out of* the old
  one; a change of beam within one satellite counts as *within* that satellite;
- level ``cell``: every handover counts *into* its new cell and *out of* its old one (cells as
  named in handovers.parquet: ``SATELLITE/bN`` beams, ``TABLE/c+Q+R`` ground cells).  A
  scheduled switch of an earth-fixed cell to another satellite keeps the ground cell, so it
  counts into and out of the same cell.

Group handovers (an earth-moving beam sweeping over many terminals, an earth-fixed cell
switching satellite) show as bursts: many terminals handed over into or out of one element in
one second.

Tables (one row per ...):

- ``load``: policy x level x element x second with any event: ``into``, ``out_of``, ``within``
  (weighted), ``into_terminals``, ``out_of_terminals``, ``within_terminals`` (counts), ``total``
  (the weighted sum of the three), ``second`` and ``time_utc`` (the second's start);
- ``load_peaks``: policy x level x element: weighted totals over the run, counts, the peak of
  ``total`` per second and when it first occurs, the peaks per direction, busy seconds, the
  largest burst and the mean per second over the run;
- ``load_bursts``: policy x level x direction x burst size (terminals handed over into, out of
  or within one element in one second): how many such bursts, the handovers they hold and
  their weight - the distribution of burst sizes.

Sums over a level's elements give the population's totals: at the satellite level ``into``
and ``out_of`` each add up to the weighted satellite changes, ``within`` to the weighted beam
changes; at the cell level ``into`` and ``out_of`` each add up to all weighted handovers.

The tables are built a range of elements at a time (:func:`load_passes`), so a run's
handovers need not be in memory at once.  Cost: a sort of 2 to 4 events per handover, one
pass over the handovers per range of about ``EVENTS_PER_PASS`` events.
"""

from __future__ import annotations

from typing import Callable, Iterable, Iterator

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

# events one range holds at once (its home is the estimate, which counts it)
from ..io.estimate import LOAD_EVENTS_PER_PASS as EVENTS_PER_PASS

LEVELS = ("satellite", "cell")
DIRECTIONS = ("into", "out_of", "within")

LOAD_COLUMNS = ("policy", "level", "element", "second", "time_utc", "into", "out_of", "within",
                "into_terminals", "out_of_terminals", "within_terminals", "total")
PEAK_COLUMNS = ("policy", "level", "element", "handovers_into", "handovers_out_of",
                "handovers_within", "terminals_into", "terminals_out_of", "terminals_within",
                "peak_per_s", "peak_time_utc", "peak_into_per_s", "peak_out_of_per_s",
                "busy_seconds", "largest_burst_terminals", "mean_per_s")
BURST_COLUMNS = ("policy", "level", "direction", "burst_terminals", "bursts", "handovers",
                 "weight")


HANDOVER_COLUMNS = ("terminal", "policy", "time_utc", "scope", "from_satellite", "to_satellite",
                    "from_cell", "to_cell")
KIND_DIRECTIONS = (0, 1, 2, 0, 1)   # into, out_of, within (satellite level), into, out_of (cell)


def _dictionary(table: pa.Table, name: str) -> tuple[list, np.ndarray]:
    """(distinct values, each row's index into them) of a text or dictionary column."""
    arr = table.column(name).combine_chunks()
    if not pa.types.is_dictionary(arr.type):
        arr = pc.dictionary_encode(arr)
    if arr.null_count:
        raise ValueError(f"handovers without a value in column {name}")
    return arr.dictionary.to_pylist(), arr.indices.to_numpy().astype(np.int64)


def _mapped(table: pa.Table, name: str, lookup) -> np.ndarray:
    """``lookup(value)`` for every row of a column (one call per distinct value)."""
    values, idx = _dictionary(table, name)
    mapped = np.array([lookup(str(v)) for v in values])
    return mapped[idx] if idx.size else mapped[:0]


def _categories(codes: np.ndarray, names) -> pd.Categorical:
    return pd.Categorical.from_codes(codes, categories=pd.Index(list(names), dtype=object))


def _events(table: pa.Table, code_of: dict, weight_of: dict, policy_of: dict, n_el: int):
    """The events of a chunk of handovers, by kind (see the module docstring): for each of
    the five kinds (``KIND_DIRECTIONS``: satellite into, out of and within, cell into and
    out of), the element key
    ``(policy * 2 + level) * n_el + element``, the second and the weight of each event."""
    n = table.num_rows
    weight = _mapped(table, "terminal", weight_of.__getitem__).astype(float)
    pol = _mapped(table, "policy", policy_of.__getitem__).astype(np.int64)
    sec = np.floor(table.column("time_utc").to_numpy().astype(float)).astype(np.int64)
    inter = _mapped(table, "scope", lambda v: v == "inter-satellite").astype(bool)
    fs, ts, fc, tc = (_mapped(table, c, code_of.__getitem__).astype(np.int64) for c in (
        "from_satellite", "to_satellite", "from_cell", "to_cell"))
    every = np.ones(n, bool)
    kinds = [(inter, 0, ts), (inter, 0, fs), (~inter, 0, ts), (every, 1, tc), (every, 1, fc)]
    return [((pol[r] * 2 + lv) * n_el + el[r], sec[r], weight[r]) for r, lv, el in kinds]


def load_tables(handovers: pd.DataFrame, terminal_weight: dict[str, float], policies: list[str],
                duration_s: float) -> dict[str, pd.DataFrame]:
    """``load``, ``load_peaks`` and ``load_bursts`` (see the module docstring) of a run's
    handovers table (``time_utc`` in scenario seconds, as built before writing);
    ``terminal_weight`` maps every terminal to its weight, ``policies`` gives the policy
    order.  Rows are sorted by policy (in that order), level, element name and second, so the
    tables depend on the handovers only, not on how the run was split.  Cost: one hash pass
    over the names and one sort of the events' integer keys, O(handovers log handovers)."""
    from ..io.tables import arrow_columns
    table = arrow_columns(handovers[list(HANDOVER_COLUMNS)])
    loads, peaks, bursts = [], [], []
    for load, peak, burst in load_passes(lambda: [table], terminal_weight, policies, duration_s):
        loads.append(load)
        peaks.append(peak)
        bursts.append(burst)
    return {"load": pd.concat(loads, ignore_index=True),
            "load_peaks": pd.concat(peaks, ignore_index=True),
            "load_bursts": bursts_frame(bursts, policies)}


def load_passes(chunks: Callable[[], Iterable[pa.Table]], terminal_weight: dict[str, float],
                policies: list[str], duration_s: float
                ) -> Iterator[tuple[pd.DataFrame, pd.DataFrame, dict]]:
    """The load tables of the handovers in ``chunks()`` (Arrow tables with
    ``HANDOVER_COLUMNS``, in run order, ``time_utc`` in scenario seconds), a range of elements
    at a time: yields (``load`` rows, ``load_peaks`` rows, burst counts for
    :func:`bursts_frame`) per range, in the tables' row order.  An element's rows come from
    one range and its events are summed in run order, so the rows do not depend on the
    ranges; the ranges hold up to ``EVENTS_PER_PASS`` events each (an element with more
    gets a range of its own), so memory is bounded by that, not by the run.  Cost: two passes
    over the chunks, and one per range when there is more than one."""
    names: set = set()
    n = events = 0
    last_sec = -1
    for table in chunks():
        for c in ("from_satellite", "to_satellite", "from_cell", "to_cell"):
            values, idx = _dictionary(table, c)
            names.update(str(values[i]) for i in np.unique(idx))
        if table.num_rows:
            t = table.column("time_utc").to_numpy().astype(float)
            last_sec = max(last_sec, int(np.floor(t.max())))
            inter = int(np.sum(_mapped(table, "scope", lambda v: v == "inter-satellite")))
            events += 2 * table.num_rows + 2 * inter + (table.num_rows - inter)
        n += table.num_rows
    ordered = sorted(names)
    code_of = {name: i for i, name in enumerate(ordered)}
    policy_of = {p: i for i, p in enumerate(policies)}
    n_sec = last_sec + 1 if n else 1
    n_el = max(1, len(ordered))
    n_keys = max(1, len(policies)) * 2 * n_el
    if float(n_keys) * n_sec >= 2.0 ** 62:
        raise ValueError("too many distinct (policy, element, second) keys for the load table")
    ranges = [(0, n_keys)]
    if events > EVENTS_PER_PASS:     # element ranges of about EVENTS_PER_PASS events each
        count = np.zeros(n_keys, np.int64)
        for table in chunks():
            for ek, _, _ in _events(table, code_of, terminal_weight, policy_of, n_el):
                count += np.bincount(ek, minlength=n_keys)
        ranges, lo, held = [], 0, 0
        for k in range(n_keys):
            if held and held + count[k] > EVENTS_PER_PASS:
                ranges.append((lo, k))
                lo, held = k, 0
            held += int(count[k])
        ranges.append((lo, n_keys))
    for lo, hi in ranges:
        kinds: list[list] = [[] for _ in range(5)]
        for table in chunks():
            for j, (ek, sec, w) in enumerate(_events(table, code_of, terminal_weight,
                                                        policy_of, n_el)):
                if len(ranges) > 1:
                    m = (ek >= lo) & (ek < hi)
                    ek, sec, w = ek[m], sec[m], w[m]
                kinds[j].append((ek, sec, w))
        # kind by kind, each in run order: the order the sums of one table would take
        flat = [x for kind in kinds for x in kind]
        key = np.concatenate([ek * n_sec + sec for ek, sec, _ in flat] or [np.zeros(0, np.int64)])
        w = np.concatenate([w for _, _, w in flat] or [np.zeros(0)])
        direction = np.concatenate(
            [np.full(ek.size, d, np.int8) for d, kind in zip(KIND_DIRECTIONS, kinds)
             for ek, _, _ in kind] or [np.zeros(0, np.int8)])
        yield _range_tables(key, direction, w, n_sec, n_el, ordered, policies, duration_s)


def _range_tables(key: np.ndarray, direction: np.ndarray, w: np.ndarray, n_sec: int,
                  n_el: int, names: list[str], policies: list[str], duration_s: float
                  ) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """``load`` and ``load_peaks`` rows and the burst counts of one range's events."""
    uniq, inv = np.unique(key, return_inverse=True)
    inv = inv.reshape(-1)
    per: dict[str, np.ndarray] = {}
    for j, name in enumerate(DIRECTIONS):
        m = direction == j
        per[name] = np.bincount(inv[m], weights=w[m], minlength=uniq.size)
        per[f"{name}_terminals"] = np.bincount(inv[m], minlength=uniq.size).astype(np.int64)
    second = uniq % n_sec
    element_key = uniq // n_sec                        # (policy, level, element)
    e = element_key % n_el
    lv = (element_key // n_el) % 2
    p = element_key // (2 * n_el)
    total = per["into"] + per["out_of"] + per["within"]
    load = pd.DataFrame({
        "policy": _categories(p, policies), "level": _categories(lv, LEVELS),
        "element": _categories(e, names), "second": second.astype(np.int64),
        "time_utc": second.astype(float),
        **{k: per[k] for k in ("into", "out_of", "within", "into_terminals",
                               "out_of_terminals", "within_terminals")},
        "total": total})
    # rows are sorted by (policy, level, element, second): an element's rows are contiguous
    new = np.ones(uniq.size, bool)
    new[1:] = element_key[1:] != element_key[:-1]
    start = np.flatnonzero(new)
    return load, _peaks(load, per, total, start, duration_s), _burst_counts(p, lv, per)


def _peaks(load: pd.DataFrame, per: dict[str, np.ndarray], total: np.ndarray,
           start: np.ndarray, duration_s: float) -> pd.DataFrame:
    """One row per element; ``start`` holds the first row of each element's run of rows."""
    if not len(load):
        return pd.DataFrame({c: load[c].iloc[:0] for c in ("policy", "level", "element")} | {
            c: np.zeros(0, np.int64 if c.startswith(("terminals", "busy", "largest")) else float)
            for c in PEAK_COLUMNS[3:]})
    end = np.append(start[1:], len(load))
    rows = np.arange(len(load))
    peak = np.maximum.reduceat(total, start)
    at_peak = total == np.repeat(peak, end - start)
    first = np.minimum.reduceat(np.where(at_peak, rows, len(load)), start)
    burst = np.maximum.reduce([per[f"{d}_terminals"] for d in DIRECTIONS])
    out = load.iloc[start][["policy", "level", "element"]].reset_index(drop=True)
    for d in DIRECTIONS:
        out[f"handovers_{d}"] = np.add.reduceat(per[d], start)
    for d in DIRECTIONS:
        out[f"terminals_{d}"] = np.add.reduceat(per[f"{d}_terminals"], start)
    out["peak_per_s"] = peak
    out["peak_time_utc"] = load["second"].to_numpy(dtype=float)[first]
    out["peak_into_per_s"] = np.maximum.reduceat(per["into"], start)
    out["peak_out_of_per_s"] = np.maximum.reduceat(per["out_of"], start)
    out["busy_seconds"] = (end - start).astype(np.int64)
    out["largest_burst_terminals"] = np.maximum.reduceat(burst, start).astype(np.int64)
    out["mean_per_s"] = np.add.reduceat(total, start) / float(duration_s)
    return out


def _burst_counts(p: np.ndarray, lv: np.ndarray, per: dict[str, np.ndarray]) -> dict:
    """Bursts per (policy, level, direction, size) of one range's per-second rows."""
    keys, ws = [], []
    top = max(1, int(max((per[f"{d}_terminals"].max(initial=0) for d in DIRECTIONS))) + 1)
    for j, d in enumerate(DIRECTIONS):
        k = per[f"{d}_terminals"]
        m = k > 0
        keys.append(((p[m] * 2 + lv[m]) * len(DIRECTIONS) + j) * top + k[m])
        ws.append(per[d][m])
    key, w = np.concatenate(keys), np.concatenate(ws)
    uniq, inv = np.unique(key, return_inverse=True)
    inv = inv.reshape(-1)
    rest = uniq // top
    return {"size": uniq % top, "group": rest,     # group: (policy * 2 + level) * 3 + direction
            "bursts": np.bincount(inv, minlength=uniq.size).astype(np.int64),
            "weight": np.bincount(inv, weights=w, minlength=uniq.size)}


def bursts_frame(counts: list[dict], policies: list[str]) -> pd.DataFrame:
    """``load_bursts`` from the burst counts of every range (summed where ranges share a
    (policy, level, direction, size))."""
    size = np.concatenate([c["size"] for c in counts]).astype(np.int64)
    group = np.concatenate([c["group"] for c in counts]).astype(np.int64)
    top = int(size.max(initial=0)) + 1
    uniq, inv = np.unique(group * top + size, return_inverse=True)
    inv = inv.reshape(-1)
    size, rest = uniq % top, uniq // top
    d = rest % len(DIRECTIONS)
    lvl = (rest // len(DIRECTIONS)) % 2
    pol = rest // (2 * len(DIRECTIONS))
    bursts = np.bincount(inv, weights=np.concatenate([c["bursts"] for c in counts]),
                         minlength=uniq.size).astype(np.int64)
    return pd.DataFrame({
        "policy": _categories(pol, policies), "level": _categories(lvl, LEVELS),
        "direction": _categories(d, DIRECTIONS), "burst_terminals": size.astype(np.int64),
        "bursts": bursts, "handovers": bursts * size.astype(np.int64),
        "weight": np.bincount(inv, weights=np.concatenate([c["weight"] for c in counts]),
                              minlength=uniq.size)})
