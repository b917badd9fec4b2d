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

Cost: a sort of 2 to 4 events per handover (pandas group-by).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

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


def _values(column) -> np.ndarray:
    return np.asarray(pd.Series(column).astype(object).to_numpy(), dtype=object)


def _sorted_codes(columns: list) -> tuple[list[np.ndarray], np.ndarray]:
    """Integer codes of the values of several text columns into their sorted common names:
    one hash pass over the values, a sort of the distinct names only."""
    values = [_values(c) for c in columns]
    codes, uniq = pd.factorize(np.concatenate(values) if values else np.zeros(0, object))
    uniq = np.asarray(uniq, dtype=object)
    order = np.argsort(uniq.astype(str), kind="stable")
    rank = np.empty(order.size, np.int64)
    rank[order] = np.arange(order.size)
    codes = rank[codes] if codes.size else codes.astype(np.int64)
    bounds = np.cumsum([0] + [v.size for v in values])
    return [codes[a:b] for a, b in zip(bounds[:-1], bounds[1:])], uniq[order]


def _lookup(column, table: dict) -> np.ndarray:
    """``table[value]`` for every value of a column (one look-up per distinct value)."""
    codes, uniq = pd.factorize(_values(column))
    mapped = np.array([table[str(u)] for u in uniq])
    return mapped[codes] if codes.size else mapped[:0]


def _categories(codes: np.ndarray, names) -> pd.Categorical:
    return pd.Categorical.from_codes(codes, categories=pd.Index(list(names), dtype=object))


def load_tables(handovers: pd.DataFrame, terminal_weight: dict[str, float], policies: list[str],
                duration_s: float) -> dict[str, pd.DataFrame]:
    """``load``, ``load_peaks`` and ``load_bursts`` (see the module docstring) of a run's
    handovers table (``time_utc`` in scenario seconds, as built before writing);
    ``terminal_weight`` maps every terminal to its weight, ``policies`` gives the policy
    order.  Rows are sorted by policy (in that order), level, element name and second, so the
    tables depend on the handovers only, not on how the run was split.  Cost: one hash pass
    over the names and one sort of the events' integer keys, O(handovers log handovers)."""
    n = len(handovers)
    weight = _lookup(handovers["terminal"], terminal_weight).astype(float)
    pol = _lookup(handovers["policy"], {p: i for i, p in enumerate(policies)})
    pol = pol.astype(np.int64)
    sec = np.floor(handovers["time_utc"].to_numpy(dtype=float)).astype(np.int64)
    inter = _values(handovers["scope"]) == "inter-satellite"
    (fs, ts, fc, tc), names = _sorted_codes([handovers[c] for c in (
        "from_satellite", "to_satellite", "from_cell", "to_cell")])
    every = np.ones(n, bool)
    parts = [  # (rows, level, element, direction): see the module docstring
        (inter, 0, ts, 0), (inter, 0, fs, 1), (~inter, 0, ts, 2),
        (every, 1, tc, 0), (every, 1, fc, 1),
    ]
    n_sec = int(sec.max()) + 1 if n else 1
    n_el = max(1, names.size)
    if float(max(1, len(policies))) * 2 * n_el * n_sec >= 2.0 ** 62:
        raise ValueError("too many distinct (policy, element, second) keys for the load table")
    # one integer per (policy, level, element, second), ordered like the tuple
    key = np.concatenate([((pol[r] * 2 + lv) * n_el + el[r]) * n_sec + sec[r]
                          for r, lv, el, _ in parts])
    direction = np.concatenate([np.full(int(r.sum()), d, np.int8) for r, _, _, d in parts])
    w = np.concatenate([weight[r] for r, _, _, _ in parts])
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
    return {"load": load, "load_peaks": _peaks(load, per, total, start, duration_s),
            "load_bursts": _bursts(p, lv, per, policies)}


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


def _bursts(p: np.ndarray, lv: np.ndarray, per: dict[str, np.ndarray], policies: list[str]
            ) -> pd.DataFrame:
    """Burst-size distribution from the per-second rows' policy and level codes."""
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
    size = uniq % top
    rest = uniq // top
    d = rest % len(DIRECTIONS)
    lvl = (rest // len(DIRECTIONS)) % 2
    pol = rest // (2 * len(DIRECTIONS))
    bursts = np.bincount(inv, minlength=uniq.size).astype(np.int64)
    return pd.DataFrame({
        "policy": _categories(pol, policies), "level": _categories(lvl, LEVELS),
        "direction": _categories(d, DIRECTIONS), "burst_terminals": size.astype(np.int64),
        "bursts": bursts, "handovers": bursts * size.astype(np.int64),
        "weight": np.bincount(inv, weights=w, minlength=uniq.size)})
