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
from ..radio.cells import BEAM_STRIDE
from ..radio.procedure import KEYS as PROCEDURE_KEYS

# 3GPP TS 38.331 value sets (TimeToTrigger; RLF-TimersAndConstants), from the standard's ASN.1
TTT_VALUES_MS = (0, 40, 64, 80, 100, 128, 160, 256, 320, 480, 512, 640, 1024, 1280, 2560, 5120)
T310_VALUES_MS = (0, 50, 100, 200, 500, 1000, 2000, 4000, 6000)
N310_VALUES = (1, 2, 3, 4, 6, 8, 10, 20)
N311_VALUES = (1, 2, 3, 4, 5, 6, 8, 10)

COMMON_KEYS: dict[str, Field] = {
    "name": Field((str,), None, (), "label of this policy in the outputs (default: the rule)"),
    "rule": text(doc="which policy: a built-in rule or 'file.py:Class'"),
    "min_dwell_s": number(0.0, ge(0), doc="minimum-dwell guard: no policy handover before this"),
    "ping_pong_window_s": number(1.0, ge(0), doc="a return to the previous cell within this "
                                 "is a ping-pong: the minimum time of stay of 3GPP TR 36.839 "
                                 "(1 s, from memory)"),
    "n310": integer(1, ge(1), doc="consecutive out-of-sync indications that start T310"),
    "n311": integer(1, ge(1), doc="consecutive in-sync indications that stop T310"),
    "t310_s": number(1.0, between(0, 6), doc="radio link failure timer (TS 38.331: 0-6000 ms)"),
    "reestablishment_s": number(0.5, ge(0), doc="time to re-establish after a radio link failure "
                                "(or to set up a connection again from idle); connected-mode "
                                "rules only"),
    "t311_s": number(3.0, between(0, 30), doc="T311: how long the terminal looks for a suitable "
                     "cell to re-establish on before it goes idle (TS 38.331: 1000-30000 ms)"),
    "q_rxlevmin_dbm": number(-140.0, between(-160, -20), doc="Qrxlevmin of the S-criterion: the "
                             "RSRP a suitable cell must exceed (TS 38.304; -140 dBm is the "
                             "lowest value the IE allows, from memory)"),
}
T311_VALUES_MS = (1000, 3000, 5000, 10000, 15000, 20000, 30000)


COMMON_KEYS.update(PROCEDURE_KEYS)


def warn_if_not_in(value_s: float, allowed_ms: tuple[int, ...], source: str, where: str,
                   warn: Callable[[str], None]) -> None:
    ms = value_s * 1000.0
    if not any(abs(ms - a) < 1e-6 for a in allowed_ms):
        warn(f"warning: {source}: {where} = {value_s:g} s is not in the TS 38.331 value set "
             f"({', '.join(str(a) for a in allowed_ms)} ms); used as given")


def first_index(values: list, value: Any) -> int:
    """Position of the first ``value`` in ``values``, or -1.  The hot paths scan one row's
    few columns as a Python list: cheaper than numpy's per-call cost there."""
    return values.index(value) if value in values else -1


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
    cell: np.ndarray | None = None          # (R, W) cell id (default: beam 0 of each satellite)
    beam: np.ndarray | None = None          # (R, W) beam number, -1 for earth-fixed cells
    sinr_db: np.ndarray | None = None       # (R, W) instantaneous SINR (default: the SNR)
    rsrp_raw_dbm: np.ndarray | None = None  # (R, W) RSRP before the layer-3 filter
    ref_km: np.ndarray | None = None        # (R, W) distance to the cell's reference location
    cell_end_s: np.ndarray | None = None    # (R, W) end of the cell's service by its satellite
    pass_end_s: np.ndarray | None = None    # (R, W) end of the satellite's floor pass (ephemeris)
    ref0_km: np.ndarray | None = None       # (R, W) reference distance when first measured
    _cols: dict = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self):
        # rows built by hand (tests, plug-ins) may give satellites only: one cell each
        if self.cell is None:
            self.cell = np.where(self.sat >= 0, self.sat * BEAM_STRIDE, -1)
        if self.beam is None:
            self.beam = np.where(self.sat >= 0, 0, -1)
        if self.sinr_db is None:
            self.sinr_db = self.snr_db
        if self.rsrp_raw_dbm is None:
            self.rsrp_raw_dbm = self.rsrp_dbm
        if self.ref_km is None:
            self.ref_km = self.nadir_km
        if self.cell_end_s is None:
            self.cell_end_s = self.end_s
        if self.pass_end_s is None:
            self.pass_end_s = self.end_s
        if self.ref0_km is None:
            self.ref0_km = self.ref_km

    @property
    def n(self) -> int:
        return int(self.t_s.size)

    def column_of(self, sat: int) -> np.ndarray:
        """A column of satellite ``sat`` (any of its cells) in each row, or -1 where none is
        measured (cached).  Geometry (elevation, range, window) is the same in all of them."""
        return self._column("sat", self.sat, sat)

    def column_of_cell(self, cell: int) -> np.ndarray:
        """Column of cell ``cell`` in each row, or -1 where it is not measured (cached)."""
        return self._column("cell", self.cell, cell)

    def _column(self, kind: str, arr: np.ndarray, value: int) -> np.ndarray:
        col = self._cols.get((kind, value))
        if col is None:
            hit = arr == value
            col = np.argmax(hit, axis=1)
            col = np.where(hit[np.arange(self.n), col], col, -1)
            self._cols[(kind, value)] = col
        return col

    def cell_column_at(self, r: int, cell: int) -> int:
        """Column of cell ``cell`` in row r alone (the first, as :meth:`column_of_cell` has
        it), or -1: a list scan of one row, for the hot paths that need one instant."""
        return first_index(self.cell[r].tolist(), cell)

    def take(self, a: int, b: int) -> "Rows":
        """Rows a..b-1 of these rows as a new Rows (views, not copies)."""
        arrays = {f: getattr(self, f)[a:b] for f in _ROW_ARRAYS if getattr(self, f) is not None}
        return Rows(self.k0 + a, self.t_s[a:b], certain_until_s=self.certain_until_s,
                    final=self.final and b >= self.n, **arrays)

    def covers(self, r: int, col: int, t_s: float) -> bool:
        """Is the window in cell (r, col) open at instant t_s?"""
        return bool(col >= 0 and self.start_s[r, col] <= t_s < self.end_s[r, col])

    def row_at(self, t_s: float, period_s: float | None = None) -> int:
        """Index of the latest row at or before t_s, by exact comparison with the row instants
        (clipped to the rows held).  ``period_s`` only speeds the first guess; a wrong one
        costs a search, never a wrong row."""
        t = self.t_s
        n = t.size
        if n > 1:
            # rows sit on a regular grid: guess from the spacing, then settle by comparing
            # with the instants themselves (exact; a scalar searchsorted costs 10x more)
            t0 = float(t[0])
            dt = period_s or float(t[1]) - t0
            if t0 <= t_s < math.inf and dt > 0:
                g = int((t_s - t0) / dt)
                if g < n - 1 and float(t[g]) <= t_s < float(t[g + 1]):
                    return g
        r = int(np.searchsorted(t, t_s, side="right")) - 1
        return min(max(r, 0), n - 1)


_ROW_ARRAYS = ("sat", "win", "rsrp_dbm", "snr_db", "elevation_deg", "azimuth_deg", "range_km",
               "nadir_km", "start_s", "end_s", "range_rate_km_s", "cell", "beam", "sinr_db",
               "rsrp_raw_dbm", "ref_km", "cell_end_s", "pass_end_s", "ref0_km")


@dataclass
class Link:
    """The current serving link as a policy sees it."""

    sat: int
    start_s: float             # when the link became usable
    release_s: float           # minimum-dwell guard release (start + min_dwell, earlier if lost)
    r_start: int = 0           # first row of the link in the rows given
    serving_end_s: float = math.inf  # end of the serving window open at the link's start
    state: dict[str, Any] = field(default_factory=dict)  # per-link scratch of the naive path
    cell: int = -1             # the serving cell (-1: beam 0 of ``sat``)
    serving_stop_s: float = math.inf  # when ephemeris says the serving cell stops serving here

    def __post_init__(self):
        if self.cell < 0:
            self.cell = self.sat * BEAM_STRIDE
        if not math.isfinite(self.serving_stop_s):
            self.serving_stop_s = self.serving_end_s


@dataclass
class Decision:
    time_s: float
    target: int                # satellite index
    trigger: str               # why: "a3", "elevation", "loss", "t1", "d1", ...
    row: int                   # absolute row index whose measurements decided it
    cell: int = -1             # target cell; -1: the target satellite's strongest cell


class Policy:
    """Base class of serving policies; see the module docstring for the contract."""

    rule: ClassVar[str] = ""
    KEYS: ClassVar[dict[str, Field]] = {}
    loss_aware: ClassVar[bool] = False
    acts_after_loss: ClassVar[bool] = False   # may decide with the serving link lost (CHO)
    idle: ClassVar[bool] = False    # idle mode: no radio link monitoring, no handover procedure
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
        warn_if_not_in(params["t311_s"], T311_VALUES_MS, source, f"{where}.t311_s", warn)
        from ..radio.procedure import T304_VALUES_MS
        warn_if_not_in(params["t304_s"], T304_VALUES_MS, source, f"{where}.t304_s", warn)

    @classmethod
    def check_timing(cls, params: dict[str, Any], period_s: float, source: str, where: str,
                     warn: Callable[[str], None]) -> None:
        """Warning that needs the measurement period: a time-to-trigger shorter than it fires
        on a single measurement (see :func:`ping_pong_warning` for the other)."""
        ttt = params.get("time_to_trigger_s")
        if isinstance(ttt, (int, float)) and 0 < ttt < period_s:
            warn(f"warning: {source}: {where}.time_to_trigger_s = {ttt:g} s is shorter than "
                 f"scenario.measurement_period_s = {period_s:g} s: the condition is checked on "
                 "one measurement only")

        for key, allowed in (("n310", N310_VALUES), ("n311", N311_VALUES)):
            if params[key] not in allowed:
                warn(f"warning: {source}: {where}.{key} = {params[key]} is not in the TS 38.331 "
                     f"value set ({', '.join(map(str, allowed))}); used as given")

    # --- selection ---------------------------------------------------------------------------
    def score(self, rows: Rows, r: int) -> np.ndarray:
        """Preference of each cell of row r (higher is better); default: elevation."""
        return rows.elevation_deg[r]

    def select(self, rows: Rows, r: int, t_s: float, exclude: int = -1) -> int:
        """Best cell of row r whose window is open at t_s, or -1 (``exclude``: a satellite
        not to take).  Ties go to the lower satellite index, then to the stronger cell (higher
        RSRP), then to the lower cell id, so the choice never depends on column order."""
        ok = (rows.sat[r] >= 0) & (rows.sat[r] != exclude) & (rows.start_s[r] <= t_s) & \
             (t_s < rows.end_s[r])
        if not ok.any():
            return -1
        return int(best_column(rows, self.score(rows, r)[None, :], ok[None, :], rows_sel=r)[0])

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


def best_column(rows: Rows, score: np.ndarray, ok: np.ndarray,
                rows_sel: int | slice = slice(None)) -> np.ndarray:
    """Per row, the column with the highest ``score`` among ``ok`` cells; ties go to the
    lower satellite index, then the higher RSRP, then the lower cell id (-1 if none is ok).
    ``rows_sel`` picks the rows of ``rows`` that ``score`` and ``ok`` describe."""
    sat = np.atleast_2d(rows.sat[rows_sel])
    cell = np.atleast_2d(rows.cell[rows_sel])
    rsrp = np.nan_to_num(np.atleast_2d(rows.rsrp_dbm[rows_sel]), nan=-np.inf)
    big = np.iinfo(np.int64).max
    sc = np.where(ok, score, -np.inf)
    top = ok & (sc == sc.max(axis=1, initial=-np.inf)[:, None])
    s_key = np.where(top, sat, big)
    top &= s_key == s_key.min(axis=1, initial=big)[:, None]
    r_key = np.where(top, rsrp, -np.inf)
    top &= r_key == r_key.max(axis=1, initial=-np.inf)[:, None]
    c_key = np.where(top, cell, big)
    col = np.argmin(c_key, axis=1)
    return np.where(top.any(axis=1), col, -1)


def better_than_serving(rows: Rows, score: np.ndarray, serving_col: np.ndarray,
                        margin: float, exclude_sat: int | None = None
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Per row: the best cell by ``score`` (ties as in :func:`best_column`) and whether it
    beats the serving column by more than ``margin`` (always, when the serving cell is
    absent).  ``exclude_sat`` leaves one satellite's cells out of the contest."""
    ok = rows.sat >= 0
    if exclude_sat is not None:
        ok &= rows.sat != exclude_sat
    sc = np.where(ok, score, -np.inf)
    best_col = best_column(rows, score, ok)
    rr = np.arange(rows.n)
    bc = np.maximum(best_col, 0)
    best_val = np.where(best_col >= 0, sc[rr, bc], -np.inf)
    serving_val = np.where(serving_col >= 0, np.where(rows.sat >= 0, score, -np.inf)[
        rr, np.maximum(serving_col, 0)], -np.inf)
    beats = (best_col >= 0) & (best_col != serving_col) & (best_val > serving_val + margin)
    return best_col, beats


def strongest_of_satellite(rows: Rows, sat: int) -> np.ndarray:
    """Per row, the column of satellite ``sat``'s strongest cell (RSRP; ties to the lower cell
    id), or -1 where none of its cells is measured."""
    ok = rows.sat == sat
    return best_column(rows, np.nan_to_num(rows.rsrp_dbm, nan=-np.inf), ok)


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


def ping_pong_warning(tables: list[dict[str, Any]], period_s: float, source: str) -> str | None:
    """One warning for the policies whose ping-pong window is not longer than the measurement
    period: a return to the previous cell comes at least one period after the handover, so
    such a window sees (almost) none."""
    short = [f"policy[{i + 1}]" for i, p in enumerate(tables)
             if p["ping_pong_window_s"] <= period_s]
    if not short:
        return None
    return (f"warning: {source}: ping_pong_window_s is not longer than "
            f"scenario.measurement_period_s = {period_s:g} s in {', '.join(short)}: a return "
            "within one period cannot be seen, so ping-pong counts (almost) nothing; shorten "
            "the period or lengthen the window")
