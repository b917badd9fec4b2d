"""What both kernels share: the run's settings, its records, radio-link-monitoring rules and the
cost of executing a handover.  The kernels differ only in how they find the next decision.

Execution model of one terminal under one policy (both kernels implement exactly this):

- Down (at the start, after a radio link failure or handover failure): at the first
  measurement instant with a suitable cell (RSRP above ``q_rxlevmin_dbm``, SINR at or above
  Q_out) the policy selects one; the link starts then (initial access) or after
  ``reestablishment_s`` (re-establishment while T311 runs, else a new setup from idle); an
  idle-mode terminal camps after ``interruption_s`` instead (cell selection, start reason
  "cell-selection"; :meth:`RunSettings.back_in_service`).
- Up on cell c of satellite s: radio link monitoring on the TS 38.133 cadence
  (:mod:`dwell.kernel.rlm`): an indication every ``rlm_indication_s``, out-of-sync when the
  SINR averaged over the last ``rlm_evaluation_out_s`` is below ``q_out_sinr_db`` (or c is not
  measured), in-sync when the one over ``rlm_evaluation_in_s`` is at or above
  ``q_in_sinr_db``.  N310 consecutive out-of-sync start T310; N311 consecutive in-sync before it
  expires stop it; expiry is a radio link failure (TS 38.331 section 5.3.10).  The
  minimum-dwell guard releases ``min_dwell_s`` after the link starts, or at the first
  out-of-sync instant if earlier.  Idle-mode rules (``Policy.idle``) have no monitoring:
  camping is lost at the first measurement with c unmeasured or not suitable.
- Next event of a link: the earliest of the policy's decision, an earth-fixed cell's switch, the
  loss of s for ephemeris-aware policies (the end of each of s's windows, if a satellite is in
  view then), a radio link failure, and the end of the scenario; at equal times in that order.
- A link's policy decisions come strictly after the decision that opened it (a zero-length
  break must not let the next decision fall at the same instant).
- A policy decision needs the serving link: one that falls while the serving satellite is out
  of view (set, blocked, or none of its cells measured) cannot be commanded and is dropped;
  the policy starts afresh from the first measurement instant with the satellite back in view
  (the same for every rule).  Conditional handover and idle reselection, decided by the
  terminal itself, are exempt (``acts_after_loss``).
- Handover decided at t to cell c' of satellite n, through the procedure of
  :mod:`dwell.radio.procedure` (``procedure = "nr"``): command at t_cmd (after report,
  decision and preparation for measurement-based rules; t for the others), the terminal leaves
  c at t_leave = t_cmd + RRC processing, re-points (another satellite), and access completes at
  t_done.  Break-before-make: the link to c ends at t_leave, the new one starts at t_done.
  Make-before-break (two or more apertures, another satellite): a free aperture re-points from
  t; the link to c ends at t_done and a break of ``mbb_interruption_s`` follows.  Too late (the
  source fails before t_leave): a radio link failure instead.  Failure (target unfit at t_done,
  or access longer than T304): handover failure at T304's expiry, then as after a failure.
  ``procedure = "instant"`` (and idle mode): the handover takes effect at t; within one
  satellite the break is ``interruption_s``; to another, break-before-make breaks for
  ``interruption_s`` + re-pointing, make-before-break keeps s until t + re-pointing and breaks
  for ``mbb_interruption_s``.
  Re-pointing: mechanical apertures slew the angle between the old and new directions at
  ``slew_rate_deg_s`` (+ ``settle_s``); electronic ones take ``retune_s``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..policies.base import Decision, Policy, Rows, first_index, strongest_of_satellite
from ..radio.cells import BEAM_STRIDE, ground_key, is_ground
from ..radio.hardware import Hardware
from ..radio.measure import MeasurementStream, row_at_or_after
from ..radio.procedure import ProcedureSettings, timeline
from .rlm import indications, quality_at_db, serving_sinr_db

PRIORITY = {"decision": 0, "switch": 1, "loss": 2, "rlf": 3, "end": 4}


def cell_switch(rows: Rows, link_sat: int, cell: int, horizon_s: float) -> Decision | None:
    """The scheduled switch of an earth-fixed serving cell to its next satellite.

    The network knows when the satellite serving a ground cell hands it to the next one (the
    cell's serving schedule): at that instant the terminal is handed over to the same ground
    cell on the new satellite, if it measures it at the first row at or after the switch and
    the new satellite is in view at the switch.  None when the serving cell is not earth-fixed,
    its service ends with its satellite's window, the instant lies beyond ``horizon_s``, or the
    next server cannot be measured (the link is then lost, as any other)."""
    if not is_ground(cell):
        return None
    col = rows.column_of_cell(cell)
    seen = np.flatnonzero(col >= 0)
    if seen.size == 0:
        return None
    r0 = int(seen[0])
    t_sw = switch_start(rows, r0, int(col[r0]), cell)
    if not np.isfinite(t_sw) or t_sw > horizon_s:
        return None
    r = int(np.searchsorted(rows.t_s, t_sw, side="left"))
    if r >= rows.n:
        return None
    return switch_target(rows, r, link_sat, cell, t_sw)


def switch_start(rows: Rows, r: int, col: int, cell: int) -> float:
    """The instant a serving earth-fixed cell measured at (r, col) switches satellite, or inf
    when its service ends with the satellite's window (or the cell is not earth-fixed)."""
    if not is_ground(cell):
        return math.inf
    t_sw = float(rows.cell_end_s[r, col])
    return t_sw if np.isfinite(t_sw) and t_sw < float(rows.end_s[r, col]) else math.inf


def switch_target(rows: Rows, r: int, link_sat: int, cell: int, t_sw: float) -> Decision | None:
    """The same ground cell on another satellite, measured at row r and in view at t_sw."""
    same = (ground_key(rows.cell[r]) == ground_key(cell)) & (rows.sat[r] >= 0) & \
        (rows.sat[r] != link_sat) & (rows.start_s[r] <= t_sw)
    hit = np.flatnonzero(same)
    if hit.size == 0:
        return None
    c = int(hit[0])
    return Decision(t_sw, int(rows.sat[r, c]), "cell-switch", rows.k0 + r, int(rows.cell[r, c]))


@dataclass
class RunSettings:
    terminal: str
    policy_name: str
    duration_s: float
    period_s: float
    hardware: Hardware
    n310: int
    n311: int
    t310_s: float
    reestablishment_s: float
    min_dwell_s: float
    q_out_db: float
    q_in_db: float
    ping_pong_window_s: float
    t311_s: float = 3.0
    q_rxlevmin_dbm: float = -140.0
    procedure: Any = None                 # dwell.radio.procedure.ProcedureSettings
    idle: bool = False                    # idle-mode rule: no radio link monitoring
    cho_recovery: bool = False            # recover onto a prepared CHO candidate after failure

    @classmethod
    def of(cls, terminal: dict, policy: Policy, link_params: dict, duration_s: float,
           period_s: float) -> "RunSettings":
        p = policy.params
        return cls(terminal["name"], policy.name, float(duration_s), float(period_s),
                   Hardware.from_terminal(terminal), int(p["n310"]), int(p["n311"]),
                   float(p["t310_s"]), float(p["reestablishment_s"]), float(p["min_dwell_s"]),
                   float(link_params["q_out_sinr_db"]), float(link_params["q_in_sinr_db"]),
                   float(p["ping_pong_window_s"]), float(p.get("t311_s", 3.0)),
                   float(p.get("q_rxlevmin_dbm", -140.0)),
                   # idle mode signals nothing: a reselection takes effect when decided
                   ProcedureSettings.of({**p, "procedure": "instant"} if policy.idle else p,
                                        link_params),
                   bool(policy.idle), bool(getattr(policy, "recovers_by_cho", False)))

    def back_in_service(self, t_found_s: float, t_lost_s: float) -> tuple[str, float]:
        """How service resumes at ``t_found_s``, the first instant with a suitable cell after the
        loss at ``t_lost_s``: the start reason and the delay before the new link starts.

        Connected: re-establishment while T311 runs (TS 38.331 5.3.7), else a new connection set
        up from idle; both take ``reestablishment_s``.  Idle mode has neither: the terminal is
        out of service until cell selection finds a suitable cell (TS 38.304 5.2.3, 5.2.8) and
        camps once it has read that cell's system information, the ``interruption_s`` a
        reselection takes too."""
        if self.idle:
            return "cell-selection", self.hardware.interruption_s
        if t_found_s < t_lost_s + self.t311_s:
            return "reestablishment", self.reestablishment_s
        return "setup", self.reestablishment_s

    def went_idle(self, t_lost_s: float) -> bool:
        """T311 expired inside the scenario after a loss at ``t_lost_s``: a connected terminal
        went idle (TS 38.331 5.3.7.8).  An idle-mode terminal has no T311."""
        return not self.idle and t_lost_s + self.t311_s < self.duration_s


@dataclass
class Records:
    """Everything a run produced, in time order."""

    links: list[tuple] = field(default_factory=list)       # see LINK_FIELDS
    handovers: list[tuple] = field(default_factory=list)   # see HANDOVER_FIELDS
    switching: list[tuple] = field(default_factory=list)   # start, end
    preparing: list[tuple] = field(default_factory=list)   # make-before-break re-pointing: start, end
    weak: list[tuple] = field(default_factory=list)        # serving in view but below q_out: start, end
    failures: list[float] = field(default_factory=list)    # radio link failure instants
    idle: list[float] = field(default_factory=list)        # T311 expiries: the terminal went idle
    handover_failures: list[float] = field(default_factory=list)   # T304 expiries
    events: int = 0                                        # kernel wake-ups
    sinr: "SinrHistogram | None" = None                    # serving SINR per clock hour

    def signature(self) -> list[tuple]:
        """What two kernels must agree on: every handover (time, from, to, trigger, cells) and
        link."""
        return ([("ho", round(h[0], 9), h[1], h[2], h[3], h[16], h[17], h[23])
                 for h in self.handovers] +
                [("link", k[0], round(k[2], 9), round(k[3], 9), k[4], k[5], k[6])
                 for k in self.links])


LINK_FIELDS = ("sat", "aperture", "start_s", "end_s", "start_reason", "end_reason", "cell",
               "beam")
HANDOVER_FIELDS = ("time_s", "from_sat", "to_sat", "trigger", "from_elevation_deg",
                   "to_elevation_deg", "from_rsrp_dbm", "to_rsrp_dbm", "slew_angle_deg",
                   "aperture", "interruption_s", "repoint_s", "from_range_km", "to_range_km",
                   "from_range_rate_km_s", "to_range_rate_km_s", "from_cell", "to_cell",
                   "from_beam", "to_beam", "scope", "command_s", "complete_s", "outcome")


class SinrHistogram:
    """Serving SINR at the measurement instants a terminal is served, per clock hour, in
    0.1 dB bins from -50 to +80 dB (values outside go to the end bins); plus the exact sum and
    count for the mean."""

    LO_DB, HI_DB, STEP_DB = -50.0, 80.0, 0.1

    def __init__(self, duration_s: float):
        self.n_hours = max(1, math.ceil(duration_s / 3600.0 - 1e-9))
        self.n_bins = int(round((self.HI_DB - self.LO_DB) / self.STEP_DB)) + 2
        self._counts = np.zeros((self.n_hours, self.n_bins), dtype=np.int64)
        # a link adds a few dozen values: they wait here and are binned and counted in bulk
        # (the same bins, counts and sums as one by one, without a dozen numpy calls per link)
        self._pending: list[tuple[np.ndarray, np.ndarray]] = []
        self._n_pending = 0
        self._sum_db = 0.0
        self._n = 0

    PENDING_MAX = 1 << 13     # bin once this many wait: 128 kB per terminal and policy at most

    def add(self, t_s: np.ndarray, sinr_db: np.ndarray) -> None:
        """Add values (kept by reference until binned: pass arrays nobody changes later)."""
        if t_s.size == 0:
            return
        self._pending.append((np.asarray(t_s, dtype=float), np.asarray(sinr_db, dtype=float)))
        self._n_pending += t_s.size
        if self._n_pending >= self.PENDING_MAX:
            self._flush()

    def _flush(self) -> None:
        if not self._pending:
            return
        t_s = np.concatenate([t for t, _ in self._pending])
        sinr_db = np.concatenate([v for _, v in self._pending])
        h = np.minimum((t_s // 3600.0).astype(np.int64), self.n_hours - 1)
        b = np.minimum(np.maximum(np.floor((sinr_db - self.LO_DB) / self.STEP_DB).astype(np.int64)
                                  + 1, 0), self.n_bins - 1)
        self._counts += np.bincount(h * self.n_bins + b, minlength=self._counts.size).reshape(
            self._counts.shape)
        for _, v in self._pending:             # the sum in the order the values came
            self._sum_db += float(np.sum(v))
        self._n += int(sinr_db.size)
        self._pending, self._n_pending = [], 0

    @property
    def counts(self) -> np.ndarray:
        """Values per (clock hour, bin)."""
        self._flush()
        return self._counts

    @property
    def sum_db(self) -> float:
        """Exact sum of the values (for the mean)."""
        self._flush()
        return self._sum_db

    @property
    def n(self) -> int:
        """Number of values."""
        self._flush()
        return self._n

    def edges_db(self) -> np.ndarray:
        """Lower edge of each bin (the first bin holds everything below LO_DB)."""
        return np.concatenate([[-np.inf], self.LO_DB + self.STEP_DB * np.arange(self.n_bins - 1)])


def first_rlf_s(oos: np.ndarray, ins: np.ndarray, t_s: np.ndarray, n310: int, n311: int,
                t310_s: float) -> float:
    """Instant of the first radio link failure implied by per-instant indications (inf if none
    within these rows).  Vectorised per T310 episode (episodes are few)."""
    if not oos.any():
        return math.inf
    ind = np.flatnonzero(oos | ins)
    is_out = oos[ind]
    i = 0
    while i < ind.size:
        run = _consecutive(is_out[i:])
        hit = np.flatnonzero(run >= n310)
        if hit.size == 0:
            return math.inf
        p = i + int(hit[0])
        expiry = float(t_s[ind[p]]) + t310_s
        rest = ~is_out[p + 1:]
        stop = np.flatnonzero(_consecutive(rest) >= n311)
        if stop.size and float(t_s[ind[p + 1 + int(stop[0])]]) < expiry:
            i = p + 1 + int(stop[0]) + 1      # T310 stopped: counts start afresh
            continue
        return expiry
    return math.inf


def _consecutive(x: np.ndarray) -> np.ndarray:
    """Length of the run of True ending at each position."""
    idx = np.arange(x.size)
    last_false = np.maximum.accumulate(np.where(~x, idx, -1))
    return np.where(x, idx - last_false, 0)


def monitoring(rows: Rows, cell: int, in_view_until_s: float, q_out: float, q_in: float
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per row: serving column, out-of-sync and in-sync indications, and weak (the serving
    satellite in view, ``t < in_view_until_s``, but its cell unmeasured or below q_out)."""
    col = rows.column_of_cell(cell)
    measured = col >= 0
    sinr = np.where(measured, rows.sinr_db[np.arange(rows.n), np.maximum(col, 0)], -np.inf)
    low = measured & (sinr < q_out)
    weak = low | (~measured & (rows.t_s < in_view_until_s))
    return col, ~measured | low, measured & (sinr >= q_in), weak


@dataclass
class Handover:
    """How a planned handover unfolds: the source link ends at ``old_end``; on success the
    target link starts at ``t_new`` after a break ``brk``; on failure (handover failure,
    ``outcome == "failure"``) the terminal re-establishes from ``t_new`` (T304 expiry); when
    ``too-late`` the source link fails at ``t_end`` before the terminal could leave it."""

    old_end: float
    brk: float
    t_new: float
    outcome: str
    t_end: float


def serving_stop(rows: Rows, r: int, cell: int, e0: float) -> float:
    """When ephemeris says the serving cell stops serving the terminal: the end of its
    satellite's floor pass or an earth-fixed cell's switch, by the cell at row r (the
    window end ``e0`` when the cell is not measured there)."""
    # one row of a few columns: a list scan (numpy's per-call cost dominates here)
    for c, (ce, sa) in enumerate(zip(rows.cell[r].tolist(), rows.sat[r].tolist())):
        if ce == cell and sa >= 0:
            return float(min(rows.pass_end_s[r, c], rows.cell_end_s[r, c]))
    return e0


def serving_in_view(rows: Rows, r: int, sat: int, t_s: float) -> bool:
    """Is the serving satellite in view (a window of it open, with a measured cell) at t_s, by
    the cells of row r?  A handover command needs the serving link to reach the terminal."""
    return any(sa == sat and st <= t_s < en for sa, st, en in
               zip(rows.sat[r].tolist(), rows.start_s[r].tolist(), rows.end_s[r].tolist()))


def camping_lost_s(rows: Rows, col: np.ndarray, t_from_s: float, q_rxlevmin_dbm: float) -> float:
    """Idle mode: the first measurement instant at or after ``t_from_s`` at which the camped
    cell (column ``col`` per row) is unmeasured or fails the S-criterion, or inf."""
    rr = np.arange(rows.n)
    q = np.where(col >= 0, rows.rsrp_dbm[rr, np.maximum(col, 0)], -np.inf)
    with np.errstate(invalid="ignore"):
        bad = (rows.t_s >= t_from_s) & ~(q - q_rxlevmin_dbm > 0)
    i = np.flatnonzero(bad)
    return float(rows.t_s[i[0]]) if i.size else math.inf


def suitable(rows: Rows, q_rxlevmin_dbm: float, q_out_db: float) -> np.ndarray:
    """Cells a terminal may camp on or re-establish to: TS 38.304 section 4.5, a suitable cell
    fulfils the S-criterion (section 5.2.3.2): Srxlev = Qrxlevmeas - Qrxlevmin > 0 on the
    filtered RSRP; its quality part (Squal > 0 on RSRQ, which is not modelled) is stood in
    for by the SINR at or above Q_out, so the link does not fail again at once."""
    with np.errstate(invalid="ignore"):
        return (rows.sat >= 0) & (rows.rsrp_dbm > q_rxlevmin_dbm) & (rows.sinr_db >= q_out_db)


def select_among(policy: Policy, rows: Rows, r: int, t_s: float, ok_row: np.ndarray) -> int:
    """The policy's choice at row r among the cells ``ok_row`` allows (a column, or -1)."""
    one = rows.take(r, r + 1)
    one.sat = np.where(ok_row[None, :], one.sat, -1)
    return policy.select(one, 0, t_s)


def _value(arr: np.ndarray | None, r: int, c: int) -> float:
    return float(arr[r, c]) if (arr is not None and c >= 0) else math.nan


def pointing(rows: Rows, r: int, sat: int) -> tuple[float, float] | None:
    """(azimuth, elevation) of ``sat`` at row r, or at its latest earlier row in these rows."""
    here = np.flatnonzero(rows.sat[r] == sat)
    if here.size:
        return float(rows.azimuth_deg[r, here[0]]), float(rows.elevation_deg[r, here[0]])
    col = rows.column_of(sat)[: r + 1]
    hit = np.flatnonzero(col >= 0)
    if hit.size == 0:
        return None
    q = int(hit[-1])
    return float(rows.azimuth_deg[q, col[q]]), float(rows.elevation_deg[q, col[q]])


def angle_between_deg(a: tuple[float, float] | None, b: tuple[float, float] | None) -> float:
    """Angle between two (azimuth, elevation) directions; 0 when either is unknown."""
    if a is None or b is None:
        return 0.0
    r = math.pi / 180.0
    az1, el1, az2, el2 = a[0] * r, a[1] * r, b[0] * r, b[1] * r
    c = math.sin(el1) * math.sin(el2) + math.cos(el1) * math.cos(el2) * math.cos(az1 - az2)
    return math.degrees(math.acos(max(-1.0, min(1.0, c))))


class KernelRun:
    """What every kernel's per-run process starts from: the policy, the execution record
    keeper, and a reader registration on the terminal's measurement stream."""

    def __init__(self, env, policy: Policy, execution: "Execution"):
        self.env = env
        self.policy = policy
        self.ex = execution
        self.s = execution.s
        self.stream = execution.stream
        self.stream.release(0, self)          # register as a reader from the start


class Execution:
    """Handover execution and record keeping for one run (shared by both kernels)."""

    def __init__(self, settings: RunSettings, stream: MeasurementStream):
        self.s = settings
        self.stream = stream
        self.rec = Records(sinr=SinrHistogram(settings.duration_s))
        self.aperture = 0
        self.link_sat = -1
        self.link_cell = -1
        self.link_beam = -1
        self.link_start = 0.0
        self.link_reason = ""
        self.next_cell = (-1, -1, -1)         # (satellite, cell, beam) a handover goes to
        self.decided_at = -math.inf            # the decision that opened the current link
        self.prepared: set[int] = set()        # CHO candidates prepared at the last failure

    def note_failure(self, t_s: float, failed_cells: tuple[int, ...]) -> None:
        """Remember the conditional-handover candidates prepared when the link failed at
        ``t_s``: the cells measured at the first measurement from then on, but the failed ones
        (common practice: the network prepares the cells the terminal reports)."""
        if not self.s.cho_recovery:
            return
        k = min(row_at_or_after(t_s, self.s.period_s), self.stream.K - 1)
        rows = self.stream.rows(k, k + 1)
        self.prepared = {int(c) for c, q in zip(rows.cell[0].tolist(), rows.sat[0].tolist())
                         if q >= 0 and c not in failed_cells}

    def recovery(self, rows: Rows, r: int, col: int, t_s: float,
                 t_fail_s: float) -> tuple[str, float] | None:
        """After a failure, the cell selected at ``t_s`` is a prepared CHO candidate while T311
        runs: the terminal executes that candidate's configuration instead of re-establishing
        (TS 38.331 5.3.7.3, attemptCondReconfig).  Returns ("cho-recovery", the time access
        takes) or None."""
        cell = int(rows.cell[r, col])
        if cell not in self.prepared or t_s >= t_fail_s + self.s.t311_s:
            return None
        self.prepared = set()
        ps = self.s.procedure
        if ps.model == "instant":
            return "cho-recovery", self.s.hardware.interruption_s
        return "cho-recovery", ps.access_time_s(float(rows.range_km[r, col]),
                                                float(rows.elevation_deg[r, col]))

    def open_link(self, sat: int, t_s: float, reason: str, cell: int = -1, beam: int = 0) -> None:
        self.link_sat, self.link_start, self.link_reason = sat, t_s, reason
        if reason != "handover":
            self.decided_at = -math.inf
        self.link_cell = cell if cell >= 0 else sat * BEAM_STRIDE
        self.link_beam = beam if cell >= 0 else 0

    def open_cell(self, rows: Rows, r: int, col: int, t_s: float, reason: str) -> None:
        """Open a link on the cell in column ``col`` of row r."""
        self.open_link(int(rows.sat[r, col]), t_s, reason, int(rows.cell[r, col]),
                       int(rows.beam[r, col]))

    def close_link(self, t_s: float, reason: str) -> None:
        if self.link_sat >= 0:
            end = min(t_s, self.s.duration_s)
            self.rec.links.append((self.link_sat, self.aperture, self.link_start, end,
                                   self.link_reason, reason, self.link_cell, self.link_beam))
        self.link_sat = -1

    def plan_handover(self, rows: Rows, d: Decision, trigger: str, t_c: float = 0.0,
                      e0: float = math.inf, rlm=None, rlf_s: float | None = None,
                      rlf_known_until_s: float = -math.inf) -> "Handover":
        """Record handover ``d``, planned through the procedure of
        :mod:`dwell.radio.procedure`, and say how it unfolds (see :class:`Handover`).

        The target cell is ``d.cell`` (or the target satellite's strongest cell at the
        decision's row).  A change within the serving satellite re-points nothing.  ``t_c`` and
        ``e0`` are the serving link's start and its window's end (for the source's radio link
        monitoring until the terminal leaves it); the rows the procedure needs beyond the
        decision are read from the stream.  A caller that already knows the serving link's
        first radio link failure up to some instant passes it (``rlf_s``,
        ``rlf_known_until_s``) and spares the procedure recomputing it."""

        hw = self.s.hardware
        ps = self.s.procedure
        r = rows.row_at(d.time_s, self.s.period_s)
        row = rows.sat[r].tolist()
        cf = first_index(row, self.link_sat)
        ct = first_index(row, d.target)
        cells = rows.cell[r].tolist()
        to_cell = d.cell
        if to_cell < 0:
            best = strongest_of_satellite(rows.take(r, r + 1), d.target)[0]
            to_cell = int(rows.cell[r, best]) if best >= 0 else d.target * BEAM_STRIDE
        pf = first_index(cells, self.link_cell)
        pt = first_index(cells, to_cell)
        if pt >= 0:
            to_beam = int(rows.beam[r, pt])
        else:
            to_beam = -1 if is_ground(to_cell) else int(to_cell % BEAM_STRIDE)
        intra = d.target == self.link_sat
        az, el = rows.azimuth_deg, rows.elevation_deg
        self.decided_at = d.time_s
        nan = math.nan
        if intra:       # an RRC handover between cells of one satellite: nothing re-points
            slew, repoint = 0.0, 0.0
            ap = self.aperture
        else:
            old = (float(az[r, cf]), float(el[r, cf])) if cf >= 0 else \
                pointing(rows, r, self.link_sat)
            new = (float(az[r, ct]), float(el[r, ct])) if ct >= 0 else pointing(rows, r, d.target)
            slew = angle_between_deg(old, new)
            repoint = float(hw.repoint_s(slew))
            ap = (self.aperture + 1) % hw.apertures if hw.make_before_break else self.aperture
        mbb = hw.make_before_break and not intra
        src = (float(rows.range_km[r, cf]), float(el[r, cf])) if cf >= 0 else (nan, nan)
        tgt = (float(rows.range_km[r, ct]), float(el[r, ct])) if ct >= 0 else (nan, nan)
        t_cmd, t_leave, t_access, t_done = timeline(ps, d.time_s, trigger, intra, src,
                                                    tgt, repoint, mbb)
        outcome, t_end = "success", t_done
        if ps.model == "instant":     # the older model: effect at the decision
            if intra:
                old_end, brk = d.time_s, hw.interruption_s
            elif mbb:
                old_end, brk = d.time_s + repoint, hw.mbb_interruption_s
            else:
                old_end, brk = d.time_s, hw.interruption_s + repoint
            t_new = old_end + brk
        else:
            if mbb:
                old_end, brk = t_done, hw.mbb_interruption_s
            else:
                old_end, brk = t_leave, t_done - t_leave
            t_new = old_end + brk
            known = rlf_s if rlf_s is not None and \
                min(t_leave, self.s.duration_s) <= rlf_known_until_s else None
            outcome, t_end = self._outcome(d, to_cell, t_c, e0, t_leave, t_access, t_done, rlm,
                                           known, rows)
            if outcome == "failure":
                t_new = t_end
                old_end = min(old_end, max(t_leave, t_access if mbb else t_leave))
            elif outcome == "too-late":
                old_end = t_new = t_end
        if mbb and outcome != "too-late":
            self.rec.preparing.append((d.time_s, min(old_end, self.s.duration_s)))
        self.rec.handovers.append((
            d.time_s, self.link_sat, d.target, trigger,
            float(el[r, cf]) if cf >= 0 else nan, float(el[r, ct]) if ct >= 0 else nan,
            float(rows.rsrp_dbm[r, pf]) if pf >= 0 else nan,
            float(rows.rsrp_dbm[r, pt]) if pt >= 0 else nan, slew, ap,
            brk if outcome == "success" else t_new - old_end, repoint,
            src[0], tgt[0],
            _value(rows.range_rate_km_s, r, cf), _value(rows.range_rate_km_s, r, ct),
            self.link_cell, to_cell, self.link_beam, to_beam,
            "intra-satellite" if intra else "inter-satellite", t_cmd, t_done, outcome))
        self._next_aperture = ap
        self.next_cell = (d.target, to_cell, to_beam)
        return Handover(old_end, brk, t_new, outcome, t_end)

    def _outcome(self, d: Decision, to_cell: int, t_c: float, e0: float, t_leave: float,
                 t_access: float, t_done: float, rlm, known_rlf_s: float | None = None,
                 held: Rows | None = None) -> tuple[str, float]:
        """too-late (the source fails before the terminal leaves it), failure (the target is not
        fit for access when it completes, or access outlasts T304) or success, and when.
        ``known_rlf_s``: the serving link's first failure, when the caller knows it; ``held``:
        rows the caller holds, read instead of the stream when they cover what is needed."""

        s = self.s
        k_end = row_at_or_after(min(max(t_leave, t_done), s.duration_s), s.period_s) + 2
        if rlm is not None and t_leave > d.time_s:
            if known_rlf_s is None:
                kc = row_at_or_after(t_c, s.period_s)
                rows = self.stream.rows(kc, k_end)
                col = rows.column_of_cell(self.link_cell)
                t_i, oos, ins = indications(rows, col, t_c, min(t_leave, s.duration_s), t_c, e0,
                                            rlm, keep_good=s.n311 + 1, keep_bad=s.n310)
                t_f = first_rlf_s(oos, ins, t_i, s.n310, s.n311, s.t310_s)
            else:
                t_f = known_rlf_s
            if d.time_s <= t_f < t_leave:
                return "too-late", t_f
        t_hof = t_access + s.procedure.t304_s
        if t_done >= s.duration_s:
            return "success", t_done
        if t_done - t_access > s.procedure.t304_s:
            return "failure", t_hof
        k_done = row_at_or_after(t_done, s.period_s)
        k_lo = max(k_done - 2, row_at_or_after(t_c, s.period_s))     # rows still held
        k_hi = min(k_end, self.stream.K)
        if held is not None and held.k0 <= k_lo and held.k0 + held.n >= k_hi:
            rows = held          # the same rows around t_done (the row after it included)
        else:
            rows = self.stream.rows(k_lo, k_hi)
        r = rows.row_at(t_done)
        c = rows.cell_column_at(r, to_cell)
        if c < 0:
            return "failure", t_hof
        q = quality_at_db(rows, to_cell, t_done, float(rows.end_s[r, c]))
        if not q >= s.q_out_db:
            return "failure", t_hof
        return "success", t_done

    def open_next(self, t_s: float) -> None:
        """Open the link a planned handover goes to."""
        sat, cell, beam = self.next_cell
        self.open_link(sat, t_s, "handover", cell, beam)

    def switch(self, old_end: float, brk: float) -> None:
        self.close_link(old_end, "handover")
        self.aperture = self._next_aperture
        if brk > 0:
            self.rec.switching.append((old_end, min(old_end + brk, self.s.duration_s)))

    def record_weak(self, rows: Rows, weak: np.ndarray, t_from: float, t_to: float) -> None:
        """Instants where the serving satellite is in view but its cell unmeasured or below
        q_out, as intervals."""
        if not weak.any():
            return
        weak = weak & (rows.t_s >= t_from) & (rows.t_s < t_to)
        starts = rows.t_s[weak]
        self.rec.weak.extend(zip(starts.tolist(),
                                 np.minimum(starts + self.s.period_s, t_to).tolist()))

    def record_sinr(self, rows: Rows, col: np.ndarray, t_from: float, t_to: float) -> None:
        """Serving SINR at the measurement instants in [t_from, t_to) where the serving cell
        is measured (into the run's histogram)."""
        # the instants in [t_from, t_to) are a slice of the sorted rows
        a, b = np.searchsorted(rows.t_s, (t_from, t_to), side="left").tolist()
        keep = col[a:b] >= 0
        if keep.any():
            self.rec.sinr.add(rows.t_s[a:b][keep], serving_sinr_db(rows, col)[a:b][keep])
