"""Run records to tables: links, handovers (with ping-pong flags) and outages with causes.

Outage accounting is exact in time: a terminal's scenario time splits into serving (attached
to a satellite that is in view and not below q_out), switching (handover breaks) and outage,
and each outage instant gets one cause:

- ``no-satellite``: nothing above the terminal's elevation floor;
- ``obstruction``: satellites above the floor but none clear of obstructions, or the serving
  satellite above the floor and blocked;
- ``no-cell``: satellites in view, but no beam of theirs covers the terminal (no cell is
  measured; multi-beam layouts that do not fill the sky);
- ``weak-signal``: the serving satellite in view but its cell below the out-of-sync SINR, or
  not measured while other cells are;
- ``failure``: satellites in view but the terminal has no usable link (lost serving satellite
  not yet replaced, radio link failure, re-establishment);
- ``repointing``: a make-before-break terminal's old link is gone while the aperture for the
  new satellite is still slewing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..kernel import RunResult
from ..kernel.common import HANDOVER_FIELDS, LINK_FIELDS
from ..radio.link import doppler_hz, one_way_delay_ms
from . import intervals as iv

CAUSES = ("no-satellite", "obstruction", "no-cell", "weak-signal", "failure", "repointing",
          "switching")


_NO_TEXT = np.zeros(0, dtype=object)   # an empty text column (an empty list would be float)


def links_frame(res: RunResult, names: list[str], cell_names=None,
                cov: "SiteCoverage | None" = None) -> pd.DataFrame:
    """One row per serving interval.  ``cell_names`` maps cell ids to readable names (see
    :func:`dwell.radio.cells.cell_names`).

    A link lasts from its start to the event that ends it (handover, failure, end of run), so
    it can hold through a blockage of its satellite (until radio link failure is declared):
    ``dwell_s`` is the whole interval and, with ``cov``, ``blocked_s`` the part of it with the
    serving satellite out of view (set or obstructed)."""
    links = res.records.links
    df = pd.DataFrame(links, columns=list(LINK_FIELDS))
    cells = df["cell"].to_numpy(dtype=np.int64)
    out = pd.DataFrame({
        "terminal": res.terminal, "policy": res.policy,
        "satellite": np.asarray(names, dtype=object)[df["sat"].to_numpy(dtype=int)] if len(df)
        else _NO_TEXT,
        "cell": cell_names(cells) if cell_names is not None else cells.astype(str),
        "beam": df["beam"].to_numpy(dtype=np.int32),
        "aperture": df["aperture"].to_numpy(dtype=np.int32),
        "start_utc": df["start_s"].to_numpy(dtype=float), "end_utc": df["end_s"].to_numpy(dtype=float),
        "dwell_s": (df["end_s"] - df["start_s"]).to_numpy(dtype=float),
        "start_reason": df["start_reason"].to_numpy(dtype=object),
        "end_reason": df["end_reason"].to_numpy(dtype=object),
        "sat_index": df["sat"].to_numpy(dtype=np.int64),
    })
    if cov is not None:
        a, b = df["start_s"].to_numpy(dtype=float), df["end_s"].to_numpy(dtype=float)
        s, e, ia = iv.intersect_same_key(df["sat"].to_numpy(dtype=np.int64), a, b, cov.win_sat,
                                         cov.win_start, cov.win_end)
        seen = np.bincount(ia, weights=e - s, minlength=len(df)) if len(df) else np.zeros(0)
        out.insert(out.columns.get_loc("dwell_s") + 1, "blocked_s",
                   np.maximum((b - a) - seen, 0.0))
    return out


def handovers_frame(res: RunResult, names: list[str], frequency_ghz: float = 2.0,
                    cell_names=None) -> pd.DataFrame:
    df = pd.DataFrame(res.records.handovers, columns=HANDOVER_FIELDS)
    name = cell_names or (lambda c: np.asarray(c).astype(str))
    names_arr = np.asarray(names, dtype=object)
    frm = df["from_sat"].to_numpy(dtype=np.int64)
    to = df["to_sat"].to_numpy(dtype=np.int64)
    t = df["time_s"].to_numpy(dtype=float)
    # ping-pong: this handover returns to the cell the previous one left, within the window
    fc = df["from_cell"].to_numpy(dtype=np.int64)
    tc = df["to_cell"].to_numpy(dtype=np.int64)
    pp = np.zeros(len(df), dtype=bool)
    ok = np.flatnonzero(df["outcome"].to_numpy(dtype=object) == "success") if len(df) else \
        np.zeros(0, dtype=np.int64)
    if ok.size > 1:     # between handovers that happened
        a, b = ok[:-1], ok[1:]
        pp[b] = (tc[b] == fc[a]) & (t[b] - t[a] <= res.settings.ping_pong_window_s)
    return pd.DataFrame({
        "terminal": res.terminal, "policy": res.policy, "time_utc": t,
        "from_satellite": names_arr[frm] if len(df) else _NO_TEXT,
        "to_satellite": names_arr[to] if len(df) else _NO_TEXT,
        "from_cell": name(fc) if len(df) else _NO_TEXT,
        "to_cell": name(tc) if len(df) else _NO_TEXT,
        "from_beam": df["from_beam"].to_numpy(dtype=np.int32),
        "to_beam": df["to_beam"].to_numpy(dtype=np.int32),
        "scope": df["scope"].to_numpy(dtype=object),
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
        # one-way delay and Doppler of both links at the handover (the jumps a terminal must
        # absorb); Doppler = -f rdot / c
        "from_delay_ms": one_way_delay_ms(df["from_range_km"].to_numpy(dtype=float)),
        "to_delay_ms": one_way_delay_ms(df["to_range_km"].to_numpy(dtype=float)),
        "from_doppler_hz": doppler_hz(df["from_range_rate_km_s"].to_numpy(dtype=float), frequency_ghz),
        "to_doppler_hz": doppler_hz(df["to_range_rate_km_s"].to_numpy(dtype=float), frequency_ghz),
        # the procedure (dwell.radio.procedure): command received, access complete, outcome
        "command_utc": df["command_s"].to_numpy(dtype=float),
        "complete_utc": df["complete_s"].to_numpy(dtype=float),
        "outcome": df["outcome"].to_numpy(dtype=object),
    })


class SiteCoverage:
    """Visibility facts of one terminal that every policy's outage accounting needs."""

    def __init__(self, windows: pd.DataFrame, passes: pd.DataFrame, duration_s: float,
                 uncovered: list[tuple[float, float]] | None = None):
        self.duration_s = duration_s
        un = uncovered or []
        self.uncovered = iv.union(np.array([u[0] for u in un], dtype=float),
                                  np.array([u[1] for u in un], dtype=float))
        self.win_sat = windows["sat"].to_numpy(dtype=np.int64)
        self.win_start = windows["start_s"].to_numpy(dtype=float)
        self.win_end = windows["end_s"].to_numpy(dtype=float)
        self.pass_sat = passes["sat"].to_numpy(dtype=np.int64)
        self.pass_start = passes["start_s"].to_numpy(dtype=float)
        self.pass_end = passes["end_s"].to_numpy(dtype=float)
        self.any_visible = iv.union(self.win_start, self.win_end)
        self.any_floor = iv.union(self.pass_start, self.pass_end)

    def in_window(self, sat: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        return iv.covered_same_key(self.win_sat, self.win_start, self.win_end, sat, t_s)

    def in_pass(self, sat: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        return iv.covered_same_key(self.pass_sat, self.pass_start, self.pass_end, sat, t_s)


def _links(res: RunResult) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    links = res.records.links
    return (np.array([x[0] for x in links], dtype=np.int64), np.array([x[2] for x in links]),
            np.array([x[3] for x in links]))


def usable_intervals(res: RunResult, cov: SiteCoverage) -> tuple[np.ndarray, np.ndarray]:
    """Time attached to a satellite that is in view and not weak."""
    ls, la, lb = _links(res)
    a, b, _ = iv.intersect_same_key(ls, la, lb, cov.win_sat, cov.win_start, cov.win_end)
    a, b = iv.union(a, b)
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
    ls, la, lb = _links(res)
    on_link = np.isin(cov.pass_sat, ls)
    cuts = np.concatenate([oa, ob, cov.any_visible[0], cov.any_visible[1], cov.any_floor[0],
                           cov.any_floor[1], la, lb, cov.pass_start[on_link], cov.pass_end[on_link],
                           np.array([w[0] for w in res.records.weak] +
                                    [w[1] for w in res.records.weak], dtype=float),
                           cov.uncovered[0], cov.uncovered[1],
                           np.array([x[0] for x in res.records.preparing] +
                                    [x[1] for x in res.records.preparing], dtype=float)])
    if oa.size:
        # cut points strictly inside an outage interval split it; every piece keeps one cause
        k = np.searchsorted(oa, cuts, side="right") - 1
        inside = (k >= 0) & (cuts > oa[np.maximum(k, 0)]) & (cuts < ob[np.maximum(k, 0)])
        edges = np.unique(np.concatenate([oa, ob, cuts[inside]]))
        s, e = edges[:-1], edges[1:]
        mid_all = 0.5 * (s + e)
        k = np.searchsorted(oa, mid_all, side="right") - 1
        keep = (k >= 0) & (mid_all < ob[np.maximum(k, 0)])
        s, e = s[keep], e[keep]
        mid = 0.5 * (s + e)
        vis = iv.count_at(cov.win_start, cov.win_end, mid) > 0
        floor = iv.count_at(cov.pass_start, cov.pass_end, mid) > 0
        li = np.searchsorted(la, mid, side="right") - 1
        in_link = (li >= 0) & (mid < lb[np.maximum(li, 0)]) if la.size else np.zeros(mid.size, bool)
        serving = np.where(in_link, ls[np.maximum(li, 0)] if la.size else -1, -1)
        cause = np.full(mid.size, "failure", dtype=object)
        il = np.flatnonzero(in_link)
        in_win = cov.in_window(serving[il], mid[il])
        in_pass = cov.in_pass(serving[il], mid[il])
        cause[il[in_win]] = "weak-signal"
        cause[vis & (iv.count_at(*cov.uncovered, mid) > 0)] = "no-cell"
        cause[il[~in_win & in_pass]] = "obstruction"
        cause[~vis & floor] = "obstruction"
        cause[~vis & ~floor] = "no-satellite"
        # make-before-break: the old link is gone while the new aperture is still slewing
        prep = res.records.preparing
        if prep:
            pa, pb = iv.union(np.array([x[0] for x in prep]), np.array([x[1] for x in prep]))
            slewing = iv.count_at(pa, pb, mid) > 0
            cause[slewing & vis] = "repointing"
        # join neighbours with one cause
        same = np.concatenate([[False], (cause[1:] == cause[:-1]) & (s[1:] == e[:-1])])
        first = np.flatnonzero(~same)
        last = np.append(first[1:] - 1, s.size - 1)
        s, e, cause = s[first], e[last], cause[first]
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
