"""Time series and distributions read from a run's tables: per-hour handovers, outage and
switching, and the intervals between successive handovers."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .summary import hour_edges, per_hour


def seconds_since(col: pd.Series, start: pd.Timestamp) -> np.ndarray:
    """A UTC timestamp column as float seconds since ``start``."""
    return (col - start).dt.total_seconds().to_numpy(dtype=float)


def hourly_series(handovers: pd.DataFrame, outages: pd.DataFrame, duration_s: float,
                  start: pd.Timestamp, pairs: list[tuple[str, str]]) -> pd.DataFrame:
    """Per clock hour of the scenario (hour 0 starts at the scenario start) and per
    (terminal, policy) in ``pairs``: handovers, outage seconds (switching excluded) and
    switching seconds, plus ``hour_s``, the hour's length (the last one may be cut).

    Returns one row per pair and hour, in the order of ``pairs``.  Cost: one histogram and two
    interval sums per pair (O(rows))."""
    edges = hour_edges(duration_s)
    n_hours = edges.size - 1
    t_ho = seconds_since(handovers["time_utc"], start)
    ho_key = handovers["terminal"].astype(str) + "\0" + handovers["policy"].astype(str)
    oa, ob = seconds_since(outages["start_utc"], start), seconds_since(outages["end_utc"], start)
    out_key = outages["terminal"].astype(str) + "\0" + outages["policy"].astype(str)
    switching = (outages["cause"].astype(str) == "switching").to_numpy()
    frames = []
    for term, pol in pairs:
        key = f"{term}\0{pol}"
        mine = (ho_key == key).to_numpy()
        count = np.histogram(t_ho[mine], bins=edges)[0]
        o = (out_key == key).to_numpy()
        frames.append(pd.DataFrame({
            "terminal": term, "policy": pol, "hour": np.arange(n_hours),
            "hour_s": np.diff(edges),
            "handovers": count.astype(np.int64),
            "outage_s": per_hour(oa[o & ~switching], ob[o & ~switching], edges),
            "switching_s": per_hour(oa[o & switching], ob[o & switching], edges),
        }))
    if not frames:
        return pd.DataFrame(columns=["terminal", "policy", "hour", "hour_s", "handovers",
                                     "outage_s", "switching_s"])
    return pd.concat(frames, ignore_index=True)


def switch_intervals(handovers: pd.DataFrame, start: pd.Timestamp) -> pd.DataFrame:
    """Time from each handover to the next of the same terminal and policy (s): one row per
    pair of successive handovers (columns terminal, policy, interval_s).  O(n log n)."""
    t = seconds_since(handovers["time_utc"], start)
    df = pd.DataFrame({"terminal": handovers["terminal"].astype(str).to_numpy(),
                       "policy": handovers["policy"].astype(str).to_numpy(), "t": t})
    df = df.sort_values(["terminal", "policy", "t"], kind="stable")
    gap = df.groupby(["terminal", "policy"], sort=False)["t"].diff()
    out = df.assign(interval_s=gap).dropna(subset=["interval_s"])
    return out[["terminal", "policy", "interval_s"]].reset_index(drop=True)
