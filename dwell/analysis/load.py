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


def _events(handovers: pd.DataFrame, weight: np.ndarray, policies: list[str]
            ) -> tuple[pd.DataFrame, np.ndarray]:
    """Events (policy code, level, element code, second, direction, weight) and the sorted
    element names the codes index."""
    n = len(handovers)
    pol = pd.Categorical(handovers["policy"].astype(str), categories=policies).codes
    pol = pol.astype(np.int64)
    sec = np.floor(handovers["time_utc"].to_numpy(dtype=float)).astype(np.int64)
    inter = (handovers["scope"].astype(str).to_numpy() == "inter-satellite") if n else \
        np.zeros(0, bool)
    fs = handovers["from_satellite"].astype(str).to_numpy(dtype=object)
    ts = handovers["to_satellite"].astype(str).to_numpy(dtype=object)
    fc = handovers["from_cell"].astype(str).to_numpy(dtype=object)
    tc = handovers["to_cell"].astype(str).to_numpy(dtype=object)
    names = np.unique(np.concatenate([fs, ts, fc, tc])) if n else np.zeros(0, dtype=object)

    def code(x: np.ndarray) -> np.ndarray:
        return np.searchsorted(names, x).astype(np.int64)
    parts = [  # (rows, level, element, direction)
        (inter, 0, code(ts), 0), (inter, 0, code(fs), 1), (~inter, 0, code(ts), 2),
        (np.ones(n, bool), 1, code(tc), 0), (np.ones(n, bool), 1, code(fc), 1),
    ]
    cols: dict[str, list[np.ndarray]] = {k: [] for k in ("p", "l", "e", "s", "d", "w")}
    for rows, level, element, direction in parts:
        k = int(rows.sum())
        cols["p"].append(pol[rows])
        cols["l"].append(np.full(k, level, np.int64))
        cols["e"].append(element[rows])
        cols["s"].append(sec[rows])
        cols["d"].append(np.full(k, direction, np.int64))
        cols["w"].append(weight[rows])
    return pd.DataFrame({k: np.concatenate(v) for k, v in cols.items()}), names


def load_tables(handovers: pd.DataFrame, terminal_weight: dict[str, float], policies: list[str],
                duration_s: float) -> dict[str, pd.DataFrame]:
    """``load``, ``load_peaks`` and ``load_bursts`` (see the module docstring) of a run's
    handovers table (``time_utc`` in scenario seconds, as built before writing);
    ``terminal_weight`` maps every terminal to its weight, ``policies`` gives the policy
    order.  Rows are sorted by policy (in that order), level, element name and second, so
    the tables depend on the handovers only, not on how the run was split."""
    names_t = list(terminal_weight)
    w_t = np.array([terminal_weight[t] for t in names_t], dtype=float)
    codes = pd.Categorical(handovers["terminal"].astype(str), categories=names_t).codes
    weight = w_t[codes] if len(handovers) else np.zeros(0)
    ev, names = _events(handovers, weight, policies)
    ev["one"] = 1
    keys = ["p", "l", "e", "s"]
    wide = ev.pivot_table(index=keys, columns="d", values=["w", "one"], aggfunc="sum",
                          fill_value=0, sort=True) if len(ev) else None
    out_cols: dict[str, np.ndarray] = {}
    if wide is not None:
        idx = wide.index.to_frame(index=False)
        for j, d in enumerate(DIRECTIONS):
            out_cols[d] = (wide[("w", j)].to_numpy(dtype=float) if ("w", j) in wide.columns
                           else np.zeros(len(wide)))
            out_cols[f"{d}_terminals"] = (wide[("one", j)].to_numpy(dtype=np.int64)
                                          if ("one", j) in wide.columns
                                          else np.zeros(len(wide), np.int64))
        p, lv, e, s = (idx[k].to_numpy(dtype=np.int64) for k in keys)
    else:
        p = lv = e = s = np.zeros(0, np.int64)
        for d in DIRECTIONS:
            out_cols[d] = np.zeros(0)
            out_cols[f"{d}_terminals"] = np.zeros(0, np.int64)
    load = pd.DataFrame({
        "policy": np.asarray(policies, dtype=object)[p] if p.size else np.zeros(0, object),
        "level": np.asarray(LEVELS, dtype=object)[lv] if lv.size else np.zeros(0, object),
        "element": names[e] if e.size else np.zeros(0, object),
        "second": s, "time_utc": s.astype(float),
        **{k: out_cols[k] for k in ("into", "out_of", "within", "into_terminals",
                                    "out_of_terminals", "within_terminals")},
    })
    load["total"] = load["into"] + load["out_of"] + load["within"]
    # rows are sorted by (policy, level, element, second): an element's rows are contiguous
    new = np.ones(p.size, bool)
    new[1:] = (p[1:] != p[:-1]) | (lv[1:] != lv[:-1]) | (e[1:] != e[:-1])
    return {"load": load, "load_peaks": _peaks(load, np.flatnonzero(new), duration_s),
            "load_bursts": _bursts(load, policies)}


def _peaks(load: pd.DataFrame, start: np.ndarray, duration_s: float) -> pd.DataFrame:
    """One row per element; ``start`` holds the first row of each element's run of rows."""
    cols = ["policy", "level", "element"]
    if not len(load):
        return pd.DataFrame({c: np.zeros(0, object) for c in cols} | {
            k: np.zeros(0) for k in ("handovers_into", "handovers_out_of", "handovers_within")} | {
            k: np.zeros(0, np.int64) for k in ("terminals_into", "terminals_out_of",
                                               "terminals_within")} | {
            "peak_per_s": np.zeros(0), "peak_time_utc": np.zeros(0), "peak_into_per_s": np.zeros(0),
            "peak_out_of_per_s": np.zeros(0), "busy_seconds": np.zeros(0, np.int64),
            "largest_burst_terminals": np.zeros(0, np.int64), "mean_per_s": np.zeros(0)})
    end = np.append(start[1:], len(load))
    total = load["total"].to_numpy(dtype=float)
    burst = np.maximum.reduce([load[f"{d}_terminals"].to_numpy() for d in DIRECTIONS])

    def red(col: str, fn=np.add) -> np.ndarray:
        return fn.reduceat(load[col].to_numpy(), start)
    peak = np.maximum.reduceat(total, start)
    # the first second of each group at which its peak occurs
    rows = np.arange(len(load))
    at_peak = total == np.repeat(peak, end - start)
    first = np.minimum.reduceat(np.where(at_peak, rows, len(load)), start)
    out = load.iloc[start][cols].reset_index(drop=True)
    out["handovers_into"] = red("into")
    out["handovers_out_of"] = red("out_of")
    out["handovers_within"] = red("within")
    out["terminals_into"] = red("into_terminals")
    out["terminals_out_of"] = red("out_of_terminals")
    out["terminals_within"] = red("within_terminals")
    out["peak_per_s"] = peak
    out["peak_time_utc"] = load["second"].to_numpy(dtype=float)[first]
    out["peak_into_per_s"] = red("into", np.maximum)
    out["peak_out_of_per_s"] = red("out_of", np.maximum)
    out["busy_seconds"] = (end - start).astype(np.int64)
    out["largest_burst_terminals"] = np.maximum.reduceat(burst, start).astype(np.int64)
    out["mean_per_s"] = np.add.reduceat(total, start) / float(duration_s)
    return out


def _bursts(load: pd.DataFrame, policies: list[str]) -> pd.DataFrame:
    rows = []
    for d in DIRECTIONS:
        k = load[f"{d}_terminals"].to_numpy()
        sel = k > 0
        rows.append(pd.DataFrame({"policy": load["policy"].to_numpy()[sel],
                                  "level": load["level"].to_numpy()[sel],
                                  "direction": d, "burst_terminals": k[sel].astype(np.int64),
                                  "weight": load[d].to_numpy(dtype=float)[sel]}))
    ev = pd.concat(rows, ignore_index=True)
    if not len(ev):
        return pd.DataFrame({"policy": np.zeros(0, object), "level": np.zeros(0, object),
                             "direction": np.zeros(0, object),
                             "burst_terminals": np.zeros(0, np.int64),
                             "bursts": np.zeros(0, np.int64), "handovers": np.zeros(0, np.int64),
                             "weight": np.zeros(0)})
    ev["policy"] = pd.Categorical(ev["policy"], categories=policies)
    ev["level"] = pd.Categorical(ev["level"], categories=list(LEVELS))
    ev["direction"] = pd.Categorical(ev["direction"], categories=list(DIRECTIONS))
    g = ev.groupby(["policy", "level", "direction", "burst_terminals"], observed=True, sort=True)
    out = g.agg(bursts=("weight", "size"), weight=("weight", "sum")).reset_index()
    out["handovers"] = (out["bursts"] * out["burst_terminals"]).astype(np.int64)
    out["bursts"] = out["bursts"].astype(np.int64)
    for c in ("policy", "level", "direction"):
        out[c] = out[c].astype(str).astype(object)
    return out[["policy", "level", "direction", "burst_terminals", "bursts", "handovers",
                "weight"]]
