"""Run records to tables: links, handovers (with ping-pong flags) and outages with causes.

Outage accounting is exact in time: a terminal's scenario time splits into serving (attached
to a satellite that is in view and not below q_out), switching (handover breaks) and outage,
and each outage instant gets one cause:

- ``no-satellite``: nothing above the terminal's elevation floor;
- ``obstruction``: satellites above the floor but none clear of obstructions, or the serving
  satellite above the floor and blocked;
- ``weak-signal``: the serving satellite in view but below the out-of-sync SNR;
- ``failure``: satellites in view but the terminal has no usable link (lost serving satellite
  not yet replaced, radio link failure, re-establishment).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..kernel import RunResult
from ..kernel.common import HANDOVER_FIELDS
from . import intervals as iv

CAUSES = ("no-satellite", "obstruction", "weak-signal", "failure", "switching")


def links_frame(res: RunResult, names: list[str]) -> pd.DataFrame:
    links = res.records.links
    cols = ["sat", "aperture", "start_s", "end_s", "start_reason", "end_reason"]
    df = pd.DataFrame(links, columns=cols)
    out = pd.DataFrame({
        "terminal": res.terminal, "policy": res.policy,
        "satellite": np.asarray(names, dtype=object)[df["sat"].to_numpy(dtype=int)] if len(df) else [],
        "aperture": df["aperture"].to_numpy(dtype=np.int32),
        "start_utc": df["start_s"].to_numpy(dtype=float), "end_utc": df["end_s"].to_numpy(dtype=float),
        "dwell_s": (df["end_s"] - df["start_s"]).to_numpy(dtype=float),
        "start_reason": df["start_reason"].to_numpy(dtype=object),
        "end_reason": df["end_reason"].to_numpy(dtype=object),
        "sat_index": df["sat"].to_numpy(dtype=np.int64),
    })
    return out


def handovers_frame(res: RunResult, names: list[str]) -> pd.DataFrame:
    df = pd.DataFrame(res.records.handovers, columns=HANDOVER_FIELDS)
    names_arr = np.asarray(names, dtype=object)
    frm = df["from_sat"].to_numpy(dtype=np.int64)
    to = df["to_sat"].to_numpy(dtype=np.int64)
    t = df["time_s"].to_numpy(dtype=float)
    # ping-pong: this handover returns to the satellite the previous one left, within the window
    pp = np.zeros(len(df), dtype=bool)
    if len(df) > 1:
        pp[1:] = (to[1:] == frm[:-1]) & (t[1:] - t[:-1] <= res.settings.ping_pong_window_s)
    return pd.DataFrame({
        "terminal": res.terminal, "policy": res.policy, "time_utc": t,
        "from_satellite": names_arr[frm] if len(df) else [],
        "to_satellite": names_arr[to] if len(df) else [],
        "trigger": df["trigger"].to_numpy(dtype=object),
        "from_elevation_deg": df["from_elevation_deg"].to_numpy(dtype=float),
        "to_elevation_deg": df["to_elevation_deg"].to_numpy(dtype=float),
        "from_rsrp_dbm": df["from_rsrp_dbm"].to_numpy(dtype=float),
        "to_rsrp_dbm": df["to_rsrp_dbm"].to_numpy(dtype=float),
        "slew_angle_deg": df["slew_angle_deg"].to_numpy(dtype=float),
        "aperture": df["aperture"].to_numpy(dtype=np.int32),
        "interruption_s": df["interruption_s"].to_numpy(dtype=float),
        "repoint_s": df["repoint_s"].to_numpy(dtype=float),
        "ping_pong": pp,
    })


def _by_sat(frame: pd.DataFrame) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    out = {}
    for sat, g in frame.groupby("sat", sort=False):
        a, b = iv.union(g["start_s"].to_numpy(), g["end_s"].to_numpy())
        out[int(sat)] = (a, b)
    return out


class SiteCoverage:
    """Visibility facts of one terminal that every policy's outage accounting needs."""

    def __init__(self, windows: pd.DataFrame, passes: pd.DataFrame, duration_s: float):
        self.duration_s = duration_s
        self.win_by_sat = _by_sat(windows)
        self.pass_by_sat = _by_sat(passes)
        self.win_start = windows["start_s"].to_numpy()
        self.win_end = windows["end_s"].to_numpy()
        self.pass_start = passes["start_s"].to_numpy()
        self.pass_end = passes["end_s"].to_numpy()
        self.any_visible = iv.union(self.win_start, self.win_end)
        self.any_floor = iv.union(self.pass_start, self.pass_end)


def usable_intervals(res: RunResult, cov: SiteCoverage) -> tuple[np.ndarray, np.ndarray]:
    """Time attached to a satellite that is in view and not weak."""
    parts_a, parts_b = [], []
    for sat, _, start, end, _, _ in res.records.links:
        wa, wb = cov.win_by_sat.get(int(sat), (np.zeros(0), np.zeros(0)))
        a, b = iv.intersect(np.array([start]), np.array([end]), wa, wb)
        parts_a.append(a)
        parts_b.append(b)
    a, b = iv.union(np.concatenate(parts_a) if parts_a else np.zeros(0),
                    np.concatenate(parts_b) if parts_b else np.zeros(0))
    weak = res.records.weak
    if weak:
        wa, wb = iv.union(np.array([w[0] for w in weak]), np.array([w[1] for w in weak]))
        a, b = iv.subtract(a, b, wa, wb)
    return a, b


def outages_frame(res: RunResult, cov: SiteCoverage) -> tuple[pd.DataFrame, dict[str, float]]:
    """Outage intervals with causes, and the time budget (serving, switching, outage)."""
    T = cov.duration_s
    ua, ub = usable_intervals(res, cov)
    sw = res.records.switching
    sa, sb = iv.union(np.array([x[0] for x in sw]), np.array([x[1] for x in sw]))
    sa, sb = iv.subtract(sa, sb, ua, ub)      # a break never overlaps service; keep it exact
    oa, ob = iv.complement(*iv.union(np.concatenate([ua, sa]), np.concatenate([ub, sb])), 0.0, T)
    # split outage at every change of the facts its cause depends on
    links = res.records.links
    la = np.array([x[2] for x in links])
    lb = np.array([x[3] for x in links])
    ls = np.array([x[0] for x in links], dtype=np.int64)
    cuts = np.concatenate([oa, ob, cov.any_visible[0], cov.any_visible[1], cov.any_floor[0],
                           cov.any_floor[1], la, lb] +
                          [np.concatenate(cov.pass_by_sat.get(int(s), (np.zeros(0), np.zeros(0))))
                           for s in np.unique(ls)] +
                          [np.array([w[0] for w in res.records.weak] + [w[1] for w in res.records.weak])])
    starts, ends, causes = [], [], []
    if oa.size:
        for a, b in zip(oa, ob):
            inner = cuts[(cuts > a) & (cuts < b)]
            edges = np.unique(np.concatenate([[a], inner, [b]]))
            starts.append(edges[:-1])
            ends.append(edges[1:])
        s = np.concatenate(starts)
        e = np.concatenate(ends)
        mid = 0.5 * (s + e)
        vis = iv.count_at(cov.win_start, cov.win_end, mid) > 0
        floor = iv.count_at(cov.pass_start, cov.pass_end, mid) > 0
        li = np.searchsorted(la, mid, side="right") - 1
        in_link = (li >= 0) & (mid < lb[np.maximum(li, 0)]) if la.size else np.zeros(mid.size, bool)
        serving = np.where(in_link, ls[np.maximum(li, 0)] if la.size else -1, -1)
        cause = np.full(mid.size, "failure", dtype=object)
        for i in np.flatnonzero(in_link):
            sat = int(serving[i])
            pa, pb = cov.pass_by_sat.get(sat, (np.zeros(0), np.zeros(0)))
            wa, wb = cov.win_by_sat.get(sat, (np.zeros(0), np.zeros(0)))
            if iv.count_at(wa, wb, mid[i:i + 1])[0] > 0:
                cause[i] = "weak-signal"
            elif iv.count_at(pa, pb, mid[i:i + 1])[0] > 0:
                cause[i] = "obstruction"
        cause[~vis & floor] = "obstruction"
        cause[~vis & ~floor] = "no-satellite"
        # join neighbours with one cause
        same = np.concatenate([[False], (cause[1:] == cause[:-1]) & (s[1:] == e[:-1])])
        grp = np.cumsum(~same) - 1
        s = pd.Series(s).groupby(grp).min().to_numpy()
        e = pd.Series(e).groupby(grp).max().to_numpy()
        cause = pd.Series(cause).groupby(grp).first().to_numpy()
    else:
        s = e = np.zeros(0)
        cause = np.zeros(0, dtype=object)
    out = pd.DataFrame({"start_s": np.concatenate([s, sa]), "end_s": np.concatenate([e, sb]),
                        "cause": np.concatenate([cause, np.full(sa.size, "switching", dtype=object)])})
    out = out.sort_values("start_s", kind="stable").reset_index(drop=True)
    frame = pd.DataFrame({"terminal": res.terminal, "policy": res.policy,
                          "start_utc": out["start_s"].to_numpy(dtype=float),
                          "end_utc": out["end_s"].to_numpy(dtype=float),
                          "duration_s": (out["end_s"] - out["start_s"]).to_numpy(dtype=float),
                          "cause": out["cause"].to_numpy(dtype=object)})
    budget = {"serving_s": iv.total(ua, ub), "switching_s": iv.total(sa, sb),
              "outage_s": iv.total(oa, ob)}
    return frame, budget
