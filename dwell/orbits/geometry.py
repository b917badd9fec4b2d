"""The geometry layer of a scenario: satellites over time and every terminal's visibility.

:class:`Geometry` walks the scenario chunk by chunk (SGP4 once per chunk for all terminals),
finds floor passes and visibility windows for every site, joins intervals that continue across a
chunk edge under one global id, and gives each window a column ("slot") so that the measurement
layer can lay the satellites in view out as a dense, narrow matrix.

Memory: one chunk of satellite states (S x n x 9 floats) plus the window tables, which grow with
duration by a few hundred bytes per pass.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from ..io.config import Scenario
from ..obstruction.site import Site
from .frames import EarthOrientation
from .passes import CAUSE_EDGE, CAUSE_NAMES, PassOptions, Windows, find_windows_many, is_fixed
from .sky import Sky

WINDOW_COLUMNS = ("id", "sat", "start_s", "end_s", "start_cause", "end_cause", "culm_s",
                  "culm_el_deg", "pass_id", "slot")


@dataclass
class SiteWindows:
    """Windows of one site in one chunk, with global ids and slots."""

    windows: Windows
    wid: np.ndarray       # global window id
    pass_gid: np.ndarray  # global floor-pass id of each window
    slot: np.ndarray      # column in the measurement matrix
    passes: Windows       # floor passes of the chunk
    pid: np.ndarray       # global floor-pass id of each pass


class _Ledger:
    """Joins intervals across chunk edges and hands out ids (and slots, for windows)."""

    def __init__(self, with_slots: bool):
        self.next_id = 0
        self.open: dict[int, int] = {}          # satellite -> id of an interval open at the edge
        self.open_slot: dict[int, int] = {}
        self.with_slots = with_slots
        self.busy: list[tuple[float, int]] = []  # (end time, slot) heap
        self.free: list[int] = []
        self.n_slots = 0

    def assign(self, w: Windows, t0_s: float) -> tuple[np.ndarray, np.ndarray]:
        n = len(w)
        ids = np.empty(n, dtype=np.int64)
        slots = np.full(n, -1, dtype=np.int64)
        order = np.argsort(w.start_s, kind="stable")
        # intervals continuing from the previous chunk keep their id (and slot); few per chunk
        cont = (w.start_cause == CAUSE_EDGE) & (w.start_s == t0_s)
        cont &= np.isin(w.sat, np.fromiter(self.open, dtype=np.int64, count=len(self.open)))
        for k in np.flatnonzero(cont):
            ids[k] = self.open[int(w.sat[k])]
            slots[k] = self.open_slot.get(int(w.sat[k]), -1)
        fresh = order[~cont[order]]
        ids[fresh] = self.next_id + np.arange(fresh.size)
        self.next_id += int(fresh.size)
        if self.with_slots:
            is_fresh = ~cont
            for k in order:                    # greedy interval colouring, in start order
                if is_fresh[k]:
                    slots[k] = self._take_slot(float(w.start_s[k]))
                if w.end_cause[k] != CAUSE_EDGE:
                    heapq.heappush(self.busy, (float(w.end_s[k]), int(slots[k])))
        edge = np.flatnonzero(w.end_cause == CAUSE_EDGE)
        self.open = {int(w.sat[k]): int(ids[k]) for k in edge}
        self.open_slot = {int(w.sat[k]): int(slots[k]) for k in edge}
        return ids, slots

    def _take_slot(self, start_s: float) -> int:
        while self.busy and self.busy[0][0] <= start_s:
            heapq.heappush(self.free, heapq.heappop(self.busy)[1])
        if self.free:
            return heapq.heappop(self.free)
        self.n_slots += 1
        return self.n_slots - 1


class WindowIndex:
    """Whole-window facts by global id (start, end, satellite, closed and, for obstructed
    windows, the floor pass each lies in), growing as chunks come."""

    def __init__(self):
        self.start_s = np.zeros(0)
        self.end_s = np.zeros(0)
        self.sat = np.zeros(0, dtype=np.int64)
        self.closed = np.zeros(0, dtype=bool)
        self.pass_id = np.zeros(0, dtype=np.int64)     # -1 where none was given

    def update(self, ids: np.ndarray, w: Windows, duration_s: float,
               pass_ids: np.ndarray | None = None) -> None:
        if ids.size == 0:
            return
        n = int(ids.max()) + 1
        if n > self.start_s.size:
            grow = max(n, 2 * self.start_s.size)
            self.start_s = np.concatenate([self.start_s, np.full(grow - self.start_s.size, np.inf)])
            self.end_s = np.concatenate([self.end_s, np.full(grow - self.end_s.size, -np.inf)])
            self.sat = np.concatenate([self.sat, np.full(grow - self.sat.size, -1)])
            self.closed = np.concatenate([self.closed, np.zeros(grow - self.closed.size, bool)])
            self.pass_id = np.concatenate([self.pass_id, np.full(grow - self.pass_id.size, -1)])
        np.minimum.at(self.start_s, ids, w.start_s)
        np.maximum.at(self.end_s, ids, w.end_s)
        self.sat[ids] = w.sat
        self.closed[ids] |= (w.end_cause != CAUSE_EDGE) | (w.end_s >= duration_s)
        if pass_ids is not None:
            self.pass_id[ids] = pass_ids


SITE_GROUP = 16     # fixed sites per pass search: enough to share each evaluation's overhead


class Geometry:
    """Chunked visibility of every site of a scenario."""

    def __init__(self, scen: Scenario, *, warn: Callable[[str], None] | None = None,
                 opts: PassOptions | None = None, sites: list[Site] | None = None,
                 slots: bool = True):
        self.scen = scen
        self.warn = warn or (lambda msg: None)
        sc = scen.scenario
        self.duration_s = float(sc["duration_s"])
        self.earth = EarthOrientation(scen.epoch, sc["ut1_utc_s"], sc["earth_rotation"])
        self.sky = Sky(scen.constellation, scen.epoch, self.duration_s,
                       step_s=sc["propagation_step_s"], chunk_s=sc["chunk_s"], warn=self.warn, keep=3)
        self.sites = scen.sites if sites is None else sites
        # earth-fixed cells: their centres are extra sites, after the terminals (their windows
        # give each cell's serving schedule); self.sites stays the terminals
        self.ground_cells = None
        if any(getattr(lay, "earth_fixed", False) for lay in getattr(scen, "layouts", [])):
            from ..radio.cells import GroundCells
            self.ground_cells = GroundCells(scen, self.sites)
        self.all_sites = list(self.sites) + (self.ground_cells.sites if self.ground_cells else [])
        self.opts = opts or PassOptions(refine_s=sc["refine_s"])
        sats = scen.constellation.satellites
        # fastest angular motion of any satellite relative to a site (perigee speed-up included)
        rate = 0.0
        for s in sats:
            e = min(s.eccentricity, 0.95)
            rate = max(rate, s.mean_motion_rad_s * (1 + e) ** 2 / (1 - e * e) ** 1.5)
        speed = max([site.max_speed_km_s for site in self.sites] + [0.0])
        self.max_rate_rad_s = rate * 1.02 + self.earth.rate_rad_s + speed / 6300.0
        n = len(self.all_sites)
        self._win_ledger = [_Ledger(slots) for _ in range(n)]   # slots: only streams need them
        self._pass_ledger = [_Ledger(False) for _ in range(n)]
        self.index = [WindowIndex() for _ in range(n)]
        self.pass_index = [WindowIndex() for _ in range(n)]   # floor passes (no obstruction)
        self._done = -1
        self.tables: list[list[SiteWindows]] = [[] for _ in range(n)]  # every chunk, kept
        self.evaluations = 0

    @property
    def n_chunks(self) -> int:
        return self.sky.n_chunks

    def chunk_windows(self, c: int) -> list[SiteWindows]:
        """Windows of every site in chunk ``c`` (chunks are computed in order, once)."""
        while self._done < c:
            self._compute(self._done + 1)
        return [t[c] for t in self.tables]

    def _compute(self, c: int) -> None:
        chunk = self.sky.chunk(c)
        for group in self._site_groups():
            found = find_windows_many(chunk, [self.all_sites[k] for k in group], self.earth,
                                      self.max_rate_rad_s, self.opts,
                                      [self.all_sites[k].los for k in group])
            for k, (passes, windows) in zip(group, found):
                self._file(k, chunk, passes, windows)
        self._done = c

    def _site_groups(self) -> list[list[int]]:
        """Sites searched together: fixed ones in groups of ``SITE_GROUP``, moving ones alone
        (the windows do not depend on the grouping)."""
        fixed = [k for k, site in enumerate(self.all_sites) if is_fixed(site)]
        groups = [fixed[i:i + SITE_GROUP] for i in range(0, len(fixed), SITE_GROUP)]
        return groups + [[k] for k, site in enumerate(self.all_sites) if not is_fixed(site)]

    def _file(self, k: int, chunk, passes: Windows, windows: Windows) -> None:
        """Give site k's passes and windows of one chunk their ids and index them."""
        pid, _ = self._pass_ledger[k].assign(passes, chunk.t0_s)
        wid, slot = self._win_ledger[k].assign(windows, chunk.t0_s)
        sw = SiteWindows(windows, wid, pid[windows.pass_id] if len(windows) else
                         np.zeros(0, np.int64), slot, passes, pid)
        self.tables[k].append(sw)
        self.index[k].update(wid, windows, self.duration_s, sw.pass_gid)
        self.pass_index[k].update(pid, passes, self.duration_s)

    def computed_until_s(self) -> float:
        return self.sky.bounds(self._done)[1] if self._done >= 0 else 0.0

    def ensure_closed(self, site_index: int, ids: np.ndarray) -> None:
        """Compute further chunks until the windows ``ids`` have known ends."""
        while self._done < self.n_chunks - 1 and ids.size and \
                not self.index[site_index].closed[ids].all():
            self._compute(self._done + 1)

    def ensure_passes_closed(self, site_index: int, ids: np.ndarray) -> None:
        """Compute further chunks until the floor passes ``ids`` have known ends."""
        while self._done < self.n_chunks - 1 and ids.size and \
                not self.pass_index[site_index].closed[ids].all():
            self._compute(self._done + 1)

    def run_all(self, progress: Callable[[int, int], None] | None = None) -> None:
        for c in range(self.n_chunks):
            self.chunk_windows(c)
            if progress:
                progress(c + 1, self.n_chunks)

    def n_slots(self, site_index: int) -> int:
        return self._win_ledger[site_index].n_slots

    # ---- whole-run tables --------------------------------------------------------------------

    def window_frame(self, site_index: int, *, floor_passes: bool = False) -> pd.DataFrame:
        """One row per visibility window (or floor pass) over the chunks computed so far,
        intervals continued across chunk edges joined: the first piece's start, satellite and
        causes, the last piece's end, the culmination of the highest piece.  Rows in time
        order (ties by satellite).  Cost: a sort of the pieces, no per-window Python."""
        parts = []
        for sw in self.tables[site_index]:
            w, ids = (sw.passes, sw.pid) if floor_passes else (sw.windows, sw.wid)
            if not len(w):
                continue
            parts.append((ids, w.sat, w.start_s, w.end_s, w.start_cause, w.end_cause, w.culm_s,
                          w.culm_el_deg, sw.pid if floor_passes else sw.pass_gid,
                          np.full(len(w), -1) if floor_passes else sw.slot))
        if not parts:
            return pd.DataFrame({c: pd.Series(dtype="float64" if c.endswith(("_s", "_deg"))
                                              else "int64") for c in WINDOW_COLUMNS})
        col = {c: np.concatenate([p[i] for p in parts]) for i, c in enumerate(WINDOW_COLUMNS)}
        order = np.lexsort((col["start_s"], col["id"]))          # by id, then start (stable)
        col = {c: v[order] for c, v in col.items()}
        ids = col["id"]
        first = np.flatnonzero(np.concatenate([[True], ids[1:] != ids[:-1]]))
        last = np.append(first[1:] - 1, ids.size - 1)
        # the culmination of the highest piece (the first of equals, NaN never wins)
        el = np.where(np.isnan(col["culm_el_deg"]), -np.inf, col["culm_el_deg"])
        group = np.repeat(np.arange(first.size), np.diff(np.append(first, ids.size)))
        top = np.maximum.reduceat(el, first)
        pos = np.where(el == top[group], np.arange(ids.size), ids.size)
        best = np.minimum.reduceat(pos, first)
        out = {"id": ids[first], "sat": col["sat"][first], "start_s": col["start_s"][first],
               "end_s": col["end_s"][last], "start_cause": col["start_cause"][first],
               "end_cause": col["end_cause"][last], "culm_s": col["culm_s"][best],
               "culm_el_deg": col["culm_el_deg"][best], "pass_id": col["pass_id"][first],
               "slot": col["slot"][first]}
        rank = np.lexsort((out["sat"], out["start_s"]))
        return pd.DataFrame({c: out[c][rank] for c in WINDOW_COLUMNS})

    def close(self) -> None:
        self.sky.close()


def cause_name(code: np.ndarray) -> np.ndarray:
    return np.asarray(CAUSE_NAMES, dtype=object)[np.asarray(code, dtype=int)]


def coverage_steps(start_s: np.ndarray, end_s: np.ndarray, duration_s: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Run-length encoding of how many intervals cover each instant of [0, duration].

    Returns (segment start, segment end, count), segments in time order covering the span.
    """
    times = np.concatenate([start_s, end_s])
    delta = np.concatenate([np.ones(start_s.size, np.int64), -np.ones(end_s.size, np.int64)])
    order = np.lexsort((delta, times))          # at equal times, ends (-1) before starts
    times, delta = times[order], delta[order]
    edges = np.concatenate([[0.0], times, [duration_s]])
    counts = np.concatenate([[0], np.cumsum(delta)])
    seg_start, seg_end = edges[:-1], edges[1:]
    keep = seg_end > seg_start
    seg_start, seg_end, counts = seg_start[keep], seg_end[keep], counts[keep]
    if counts.size:
        # merge neighbours with equal counts
        change = np.concatenate([[True], counts[1:] != counts[:-1]])
        idx = np.flatnonzero(change)
        seg_end = np.append(seg_start[idx[1:]], seg_end[-1])
        seg_start, counts = seg_start[idx], counts[idx]
    return seg_start, seg_end, counts

