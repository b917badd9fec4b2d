"""What both kernels share: the run's settings, its records, radio-link-monitoring rules and the
cost of executing a handover.  The kernels differ only in how they find the next decision.

Execution model of one terminal under one policy (both kernels implement exactly this):

- Down (at the start, after a radio link failure): at the first measurement instant with a
  satellite in view the policy selects one; the link starts then (initial access) or after
  ``reestablishment_s`` (after a failure).
- Up on satellite s: radio link monitoring takes one indication per measurement instant:
  out-of-sync when s is not in view or its SNR is below ``q_out_snr_db``, in-sync when in view
  at or above ``q_in_snr_db`` (neither in between).  N310 consecutive out-of-sync start T310;
  N311 consecutive in-sync before it expires stop it; expiry is a radio link failure (TS 38.331
  section 5.3.10).  The minimum-dwell guard releases ``min_dwell_s`` after the link starts, or
  at the first out-of-sync instant if earlier.
- Next event of a link: the earliest of the policy's decision, the loss of s for ephemeris-aware
  policies (the end of each of s's windows, if a satellite is in view then), a radio link
  failure, and the end of the scenario; at equal times in that order.
- Handover at t to satellite n: break-before-make (one aperture): the link to s ends at t, the
  terminal is switching for ``interruption_s`` + re-pointing time, then the link to n starts.
  Make-before-break (two or more apertures): a free aperture re-points while s still serves;
  the link to s ends at t + re-pointing, a break of ``mbb_interruption_s`` follows.
  Re-pointing: mechanical apertures slew the angle between the old and new directions at
  ``slew_rate_deg_s`` (+ ``settle_s``); electronic ones take ``retune_s``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..policies.base import Decision, Policy, Rows
from ..radio.hardware import Hardware
from ..radio.measure import MeasurementStream

PRIORITY = {"decision": 0, "loss": 1, "rlf": 2, "end": 3}


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

    @classmethod
    def of(cls, terminal: dict, policy: Policy, link_params: dict, duration_s: float,
           period_s: float) -> "RunSettings":
        p = policy.params
        return cls(terminal["name"], policy.name, float(duration_s), float(period_s),
                   Hardware.from_terminal(terminal), int(p["n310"]), int(p["n311"]),
                   float(p["t310_s"]), float(p["reestablishment_s"]), float(p["min_dwell_s"]),
                   float(link_params["q_out_snr_db"]), float(link_params["q_in_snr_db"]),
                   float(p["ping_pong_window_s"]))


@dataclass
class Records:
    """Everything a run produced, in time order."""

    links: list[tuple] = field(default_factory=list)       # sat, aperture, start, end, start_reason, end_reason
    handovers: list[tuple] = field(default_factory=list)   # see HANDOVER_FIELDS
    switching: list[tuple] = field(default_factory=list)   # start, end
    preparing: list[tuple] = field(default_factory=list)   # make-before-break re-pointing: start, end
    weak: list[tuple] = field(default_factory=list)        # serving in view but below q_out: start, end
    failures: list[float] = field(default_factory=list)    # radio link failure instants
    events: int = 0                                        # kernel wake-ups

    def signature(self) -> list[tuple]:
        """What two kernels must agree on: every handover (time, from, to, trigger) and link."""
        return ([("ho", round(h[0], 9), h[1], h[2], h[3]) for h in self.handovers] +
                [("link", k[0], round(k[2], 9), round(k[3], 9), k[4], k[5]) for k in self.links])


HANDOVER_FIELDS = ("time_s", "from_sat", "to_sat", "trigger", "from_elevation_deg",
                   "to_elevation_deg", "from_rsrp_dbm", "to_rsrp_dbm", "slew_angle_deg",
                   "aperture", "interruption_s", "repoint_s", "from_range_km", "to_range_km",
                   "from_range_rate_km_s", "to_range_rate_km_s")


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


def monitoring(rows: Rows, sat: int, q_out: float, q_in: float
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per row: serving column, out-of-sync and in-sync indications, and weak (in view but
    below q_out)."""
    col = rows.column_of(sat)
    vis = col >= 0
    snr = np.where(vis, rows.snr_db[np.arange(rows.n), np.maximum(col, 0)], -np.inf)
    weak = vis & (snr < q_out)
    return col, ~vis | weak, vis & (snr >= q_in), weak


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
        self.rec = Records()
        self.aperture = 0
        self.link_sat = -1
        self.link_start = 0.0
        self.link_reason = ""

    def open_link(self, sat: int, t_s: float, reason: str) -> None:
        self.link_sat, self.link_start, self.link_reason = sat, t_s, reason

    def close_link(self, t_s: float, reason: str) -> None:
        if self.link_sat >= 0:
            end = min(t_s, self.s.duration_s)
            self.rec.links.append((self.link_sat, self.aperture, self.link_start, end,
                                   self.link_reason, reason))
        self.link_sat = -1

    def plan_handover(self, rows: Rows, d: Decision, trigger: str) -> tuple[float, float, float]:
        """Record handover ``d`` and return (time the old link ends, break, new link start)."""
        hw = self.s.hardware
        r = rows.row_at(d.time_s, self.s.period_s)
        row = rows.sat[r].tolist()
        cf = row.index(self.link_sat) if self.link_sat in row else -1
        ct = row.index(d.target) if d.target in row else -1
        az, el = rows.azimuth_deg, rows.elevation_deg
        old = (float(az[r, cf]), float(el[r, cf])) if cf >= 0 else pointing(rows, r, self.link_sat)
        new = (float(az[r, ct]), float(el[r, ct])) if ct >= 0 else pointing(rows, r, d.target)
        slew = angle_between_deg(old, new)
        repoint = float(hw.repoint_s(slew))
        if hw.make_before_break:
            ap = (self.aperture + 1) % hw.apertures
            old_end, brk = d.time_s + repoint, hw.mbb_interruption_s
            self.rec.preparing.append((d.time_s, min(old_end, self.s.duration_s)))
        else:
            ap = self.aperture
            old_end, brk = d.time_s, hw.interruption_s + repoint
        nan = math.nan
        self.rec.handovers.append((
            d.time_s, self.link_sat, d.target, trigger,
            float(el[r, cf]) if cf >= 0 else nan, float(el[r, ct]) if ct >= 0 else nan,
            float(rows.rsrp_dbm[r, cf]) if cf >= 0 else nan,
            float(rows.rsrp_dbm[r, ct]) if ct >= 0 else nan, slew, ap, brk, repoint,
            float(rows.range_km[r, cf]) if cf >= 0 else nan,
            float(rows.range_km[r, ct]) if ct >= 0 else nan,
            _value(rows.range_rate_km_s, r, cf), _value(rows.range_rate_km_s, r, ct)))
        self._next_aperture = ap
        return old_end, brk, old_end + brk

    def switch(self, old_end: float, brk: float) -> None:
        self.close_link(old_end, "handover")
        self.aperture = self._next_aperture
        if brk > 0:
            self.rec.switching.append((old_end, min(old_end + brk, self.s.duration_s)))

    def record_weak(self, rows: Rows, weak: np.ndarray, t_from: float, t_to: float) -> None:
        """Instants where the serving satellite is in view but below q_out, as intervals."""
        if not weak.any():
            return
        weak = weak & (rows.t_s >= t_from) & (rows.t_s < t_to)
        starts = rows.t_s[weak]
        self.rec.weak.extend(zip(starts.tolist(),
                                 np.minimum(starts + self.s.period_s, t_to).tolist()))
