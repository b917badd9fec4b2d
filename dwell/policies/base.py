"""The plug-in interface of serving policies, and the measurement rows they read.

A policy sees the terminal's measurements as :class:`Rows`: one row per measurement instant
``t_k = k * period``, one column per satellite visibility window in view (columns are reused
once a window ends, so the matrix stays narrow).  Empty cells hold ``sat = -1`` and NaN values.

A policy answers three questions, and must answer them identically in both kernels:

- ``select(rows, r, t_s)``: which satellite to take when the terminal has none (initial access,
  re-establishment) or when its serving satellite is lost: a column of row ``r``, or -1;
- ``scan(rows, link)``: the vectorised search the event kernel uses: the first handover
  decision of the current link within the rows given, or ``None`` if there is none before
  ``rows.certain_until_s`` (the kernel then offers more rows);
- ``start(link)`` + ``step(rows, r, link)``: the per-measurement reference the naive kernel uses:
  called for every row in order, returns a decision (at ``t_r`` or, for timers that expire
  before the next row, later) or ``None``.

A decision time may fall between rows (time-to-trigger expiry, guard release, a satellite set);
the kernel checks that the target is in view at that instant.

A rule that also wants the exact instant the serving satellite is lost (ephemeris-aware
schedulers) sets ``loss_aware = True``: the kernel then calls ``select`` at the serving window's
end and hands over to the result.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, ClassVar

import numpy as np

from ..io.schema import Field, between, ge, integer, number, text

# 3GPP TS 38.331 value sets (TimeToTrigger; RLF-TimersAndConstants), from the standard's ASN.1
TTT_VALUES_MS = (0, 40, 64, 80, 100, 128, 160, 256, 320, 480, 512, 640, 1024, 1280, 2560, 5120)
T310_VALUES_MS = (0, 50, 100, 200, 500, 1000, 2000, 4000, 6000)
N310_VALUES = (1, 2, 3, 4, 6, 8, 10, 20)
N311_VALUES = (1, 2, 3, 4, 5, 6, 8, 10)

COMMON_KEYS: dict[str, Field] = {
    "name": Field((str,), None, (), "label of this policy in the outputs (default: the rule)"),
    "rule": text(doc="which policy: a built-in rule or 'file.py:Class'"),
    "min_dwell_s": number(0.0, ge(0), doc="minimum-dwell guard: no policy handover before this"),
    "ping_pong_window_s": number(1.0, ge(0), doc="a return to the previous satellite within this "
                                 "is a ping-pong (3GPP TR 36.839 uses 1 s, from memory)"),
    "n310": integer(1, ge(1), doc="consecutive out-of-sync indications that start T310"),
    "n311": integer(1, ge(1), doc="consecutive in-sync indications that stop T310"),
    "t310_s": number(1.0, between(0, 6), doc="radio link failure timer (TS 38.331: 0-6000 ms)"),
    "reestablishment_s": number(0.5, ge(0), doc="time to re-establish after a radio link failure"),
}


def warn_if_not_in(value_s: float, allowed_ms: tuple[int, ...], source: str, where: str,
                   warn: Callable[[str], None]) -> None:
    ms = value_s * 1000.0
    if not any(abs(ms - a) < 1e-6 for a in allowed_ms):
        warn(f"warning: {source}: {where} = {value_s:g} s is not in the TS 38.331 value set "
             f"({', '.join(str(a) for a in allowed_ms)} ms); used as given")


@dataclass
class Rows:
    """Measurement rows ``k0 .. k0 + R - 1`` of one terminal (see the module docstring)."""

    k0: int
    t_s: np.ndarray            # (R,)
    sat: np.ndarray            # (R, W) int, -1 where empty
    win: np.ndarray            # (R, W) int, window id
    rsrp_dbm: np.ndarray       # (R, W) L3-filtered RSRP
    snr_db: np.ndarray         # (R, W) instantaneous SNR (radio link monitoring)
    elevation_deg: np.ndarray  # (R, W)
    azimuth_deg: np.ndarray    # (R, W)
    range_km: np.ndarray       # (R, W)
    nadir_km: np.ndarray       # (R, W) ground distance to the satellite's nadir point
    start_s: np.ndarray        # (R, W) start of each cell's visibility window
    end_s: np.ndarray          # (R, W) end of each cell's visibility window (predicted set)
    certain_until_s: float = math.inf  # rows beyond this instant were not provided
    final: bool = False        # these rows reach the end of the scenario
    range_rate_km_s: np.ndarray | None = None  # (R, W) when the stream provides it
    _cols: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def n(self) -> int:
        return int(self.t_s.size)

    def column_of(self, sat: int) -> np.ndarray:
        """Column of satellite ``sat`` in each row, or -1 where it is not in view (cached)."""
        col = self._cols.get(sat)
        if col is None:
            hit = self.sat == sat
            col = np.argmax(hit, axis=1)
            col = np.where(hit[np.arange(self.n), col], col, -1)
            self._cols[sat] = col
        return col

    def covers(self, r: int, col: int, t_s: float) -> bool:
        """Is the window in cell (r, col) open at instant t_s?"""
        return bool(col >= 0 and self.start_s[r, col] <= t_s < self.end_s[r, col])

    def row_at(self, t_s: float, period_s: float | None = None) -> int:
        """Index of the latest row at or before t_s, by exact comparison with the row instants
        (clipped to the rows held)."""
        r = int(np.searchsorted(self.t_s, t_s, side="right")) - 1
        return min(max(r, 0), self.n - 1)


@dataclass
class Link:
    """The current serving link as a policy sees it."""

    sat: int
    start_s: float             # when the link became usable
    release_s: float           # minimum-dwell guard release (start + min_dwell, earlier if lost)
    r_start: int = 0           # first row of the link in the rows given
    serving_end_s: float = math.inf  # end of the serving window open at the link's start
    state: dict[str, Any] = field(default_factory=dict)  # per-link scratch of the naive path


@dataclass
class Decision:
    time_s: float
    target: int                # satellite index
    trigger: str               # why: "a3", "elevation", "loss", "t1", "d1", ...
    row: int                   # absolute row index whose measurements decided it


class Policy:
    """Base class of serving policies; see the module docstring for the contract."""

    rule: ClassVar[str] = ""
    KEYS: ClassVar[dict[str, Field]] = {}
    loss_aware: ClassVar[bool] = False
    lookahead_rows: int = 0    # rows past a decision the vectorised scan needs to see

    def __init__(self, params: dict[str, Any], period_s: float):
        self.params = params
        self.name = params["name"]
        self.period_s = float(period_s)

    @classmethod
    def check(cls, params: dict[str, Any], source: str, where: str,
              warn: Callable[[str], None]) -> None:
        """Cross-key checks and warnings; raise InputError for bad values."""
        warn_if_not_in(params["t310_s"], T310_VALUES_MS, source, f"{where}.t310_s", warn)
        for key, allowed in (("n310", N310_VALUES), ("n311", N311_VALUES)):
            if params[key] not in allowed:
                warn(f"warning: {source}: {where}.{key} = {params[key]} is not in the TS 38.331 "
                     f"value set ({', '.join(map(str, allowed))}); used as given")

    # --- selection ---------------------------------------------------------------------------
    def score(self, rows: Rows, r: int) -> np.ndarray:
        """Preference of each cell of row r (higher is better); default: elevation."""
        return rows.elevation_deg[r]

    def select(self, rows: Rows, r: int, t_s: float, exclude: int = -1) -> int:
        """Best cell of row r whose window is open at t_s, or -1.  Ties go to the lower
        satellite index, so the choice never depends on column order."""
        ok = (rows.sat[r] >= 0) & (rows.sat[r] != exclude) & (rows.start_s[r] <= t_s) & \
             (t_s < rows.end_s[r])
        if not ok.any():
            return -1
        score = np.where(ok, self.score(rows, r), -np.inf)
        best = score.max()
        tied = np.flatnonzero(ok & (score == best))
        return int(tied[np.argmin(rows.sat[r, tied])])

    # --- the two kernels' entry points ---------------------------------------------------------
    def scan(self, rows: Rows, link: Link) -> Decision | None:
        """Vectorised first decision; the default walks ``step`` (correct but slow)."""
        self.start(link)
        for r in range(link.r_start, rows.n):
            if rows.t_s[r] > rows.certain_until_s:
                return None
            d = self.step(rows, r, link)
            if d is not None:
                return d
        return None

    def start(self, link: Link) -> None:
        link.state.clear()

    def step(self, rows: Rows, r: int, link: Link) -> Decision | None:
        # reached only by a rule overriding neither step nor scan; load_rule refuses those
        raise TypeError(f"policy {self.rule!r} implements neither scan nor step")


def better_than_serving(rows: Rows, score: np.ndarray, serving_col: np.ndarray,
                        margin: float) -> tuple[np.ndarray, np.ndarray]:
    """Per row: the best cell by ``score`` (ties to the lower satellite index) and whether it
    beats the serving cell by more than ``margin`` (always, when the serving cell is absent)."""
    ok = rows.sat >= 0
    sc = np.where(ok, score, -np.inf)
    best_val = sc.max(axis=1, initial=-np.inf)
    tied = ok & (sc == best_val[:, None])
    sat_key = np.where(tied, rows.sat, np.iinfo(np.int64).max)
    best_col = np.argmin(sat_key, axis=1)
    rr = np.arange(rows.n)
    serving_val = np.where(serving_col >= 0, sc[rr, np.maximum(serving_col, 0)], -np.inf)
    has_best = np.isfinite(best_val)
    beats = has_best & (best_col != serving_col) & (best_val > serving_val + margin)
    beats &= (rows.sat[rr, best_col] >= 0)
    return best_col, beats


def held_runs(cond: np.ndarray, win: np.ndarray, m: int) -> np.ndarray:
    """For each cell, True at row a when ``cond`` holds at rows a..a+m in the same window and
    row a starts that run (cond false, or another window, at row a-1).  Vectorised over cells."""
    n = cond.shape[0]
    same_prev = np.zeros_like(cond)
    same_prev[1:] = win[1:] == win[:-1]
    begins = cond & ~(same_prev & np.vstack([np.zeros((1,) + cond.shape[1:], bool), cond[:-1]]))
    if m == 0:
        return begins
    # a run from row a lasts until the first later row where cond fails or the window changes
    stop = ~cond.copy()
    stop[1:] |= ~same_prev[1:]
    idx = np.arange(n).reshape((n,) + (1,) * (cond.ndim - 1))
    pos = np.where(stop, idx, n)
    next_stop = np.minimum.accumulate(pos[::-1], axis=0)[::-1]          # first stop at >= r
    after = np.concatenate([next_stop[1:], np.full((1,) + cond.shape[1:], n)], axis=0)
    return begins & (after - idx >= m + 1)
