"""What a run will cost, from its configuration alone: peak memory and CPU time, before any work.

:func:`estimate_run` looks at the checked tables only (nothing is built or propagated, so
``satellites = 10**9`` is answered at once) and returns an :class:`Estimate` whose parts name
the configuration keys that drive them.  :func:`refuse_if_too_big` turns an estimate larger than
the machine's available memory into one :class:`~dwell.io.errors.InputError` line.

Where the memory goes (the engine's layout, see DEVELOPERS.md):

- the interpreter and libraries: ``BASE_B``;
- satellites: an SGP4 record and its copy in the vectorised array (``SAT_B`` each), and the sky
  chunks kept in memory (up to ``CHUNKS_KEPT``): per satellite and grid point the states and
  their derived arrays (``POINT_B``), plus the sub-grid positions pass finding touches
  (``SUB_B``, a share that grows with the number of terminals);
- terminals: each measurement stream's rolling buffer, ``4 B`` rows of ``width`` columns of
  ``FIELD_B`` bytes with ``B = 900 s / measurement_period_s`` rows per block (the streams of
  ``TERMINAL_BATCH`` terminals per process live at once), and one block's temporaries per
  (row, satellite in view) pair (``PAIR_B``); several beams per satellite multiply the
  width, hence ``width_factor``;
- geometry tables: ``WINDOW_B`` per visibility window of the terminals a process runs at once
  (every terminal's for ``dwell passes``);
- results: ``RESULT_B`` per expected handover of the terminals a process runs at once (its
  links, outage and handover rows, the records and the frames built from them; the batches'
  tables are stored part by part as they finish), ``SUMMARY_B`` per terminal and policy, and
  ``LOAD_EVENT_B`` per event of one range of the load tables (at most
  ``LOAD_EVENTS_PER_PASS``); street canyons: ``BUILDING_B`` per generated building.

How many satellites are in view and how often passes come are estimated for a uniform (isotropic)
shell: a satellite at radius r is above elevation e within the Earth central angle
``psi = acos(R cos(e) / r) - e`` (Larson & Wertz, Space Mission Analysis and Design, sec. 5.2;
from memory), so the mean number in view is ``N f`` with ``f = (1 - cos psi) / 2``, and the rate
of passes is the flux of satellites into the cap, ``N sin(psi) omega / (2 pi)`` for satellites
moving on great circles at angular rate omega.  A shell of inclination i is not uniform in
latitude: the fraction of its satellites below latitude x is ``1/2 + asin(sin x / sin i) / pi``
(circular orbits; none beyond |x| = i), so the cap's share is scaled by the ratio of the
shell's to a uniform sphere's fraction in the latitude band the cap spans.  Element-set files
are counted (not parsed) and taken as uniform shells at 550 km.  Handovers per policy come at
the pass rate times ``min(1, HANDOVER_SCALE / sqrt(mean in view))``: with more satellites in
view a link outlives more passes (measured from 0.1 to 1.6 per pass, lowest for dense shells).

Calibration (``CPU_*``, ``*_B``, ``HANDOVER_SCALE``): measured on this project's development
machine (2 shared cores, Python 3.11) with ``dwell run --workers 1`` under ``/usr/bin/time``
(user + system time, maximum resident set): 19 runs of Walker shells from 200 to 40,000
satellites, 1 to 300 terminals, 10 minutes to a day, 1 to 16 policies and measurement periods
of 0.05 to 1 s - configs/demo.toml and configs/quick.toml among them, and runs built to isolate
propagation (terminals at the pole that see nothing), screening, measurement (0.05 s period)
and the kernel (16 A3 variants) - then configs/sweep-demo.toml (2 tasks of 32 policies, 109 s
measured, 126 s estimated).  On those runs the measured CPU time was 0.67x to 1.3x the estimate
and the measured memory 0.54x to 1.08x (the estimate is high for terminals that see little);
another machine scales the time, not the memory.  The naive kernel adds ``CPU_NAIVE_ROW_S`` per
row and policy (measured on one run).
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError

TERMINAL_BATCH = 64       # terminals one process runs at once (dwell.run.run_tables)

# ---- memory (bytes) ---------------------------------------------------------------------------
BASE_B = 200e6            # interpreter, numpy, pandas, pyarrow, scipy, sgp4 loaded
SAT_B = 3.0e3             # Satrec + Satellite + SatrecArray entry
POINT_B = 190.0           # per satellite and grid point of a kept chunk: r, v, a, pack, directions
SUB_B = 264.0             # sub-grid positions per grid interval (11 points x 3 x 8 bytes)
CHUNKS_KEPT = 3           # the sky's chunk cache (dwell.orbits.geometry keeps 3)
FIELD_B = 96.0            # 11 float/int fields and the time of one buffer cell
PAIR_B = 320.0            # temporaries per (row, satellite) pair of a block being built
WINDOW_B = 240.0          # a window and its pass, in the chunk tables and the window index
RESULT_B = 1.0e3          # per expected handover: its rows in links/handovers/outages
SUMMARY_B = 4.0e3         # per terminal and policy: its summary and map rows (kept for the run)
LOAD_EVENT_B = 200.0      # per load event of one range: keys, sums, sort and the rows built
# load events one range of dwell.analysis.load holds at once (more make another pass)
LOAD_EVENTS_PER_PASS = 2_000_000
BUILDING_B = 100.0        # a canyon building: start, end, height and sorting temporaries

# ---- CPU time (seconds) -----------------------------------------------------------------------
CPU_BASE_S = 2.0          # start-up, reading, writing the folder
CPU_SAT_S = 3.6e-5        # building one satellite's record
CPU_SAMPLE_S = 5.4e-7     # per satellite and SGP4 grid point (propagation, Hermite data)
CPU_SCREEN_S = 2.8e-8     # per terminal, satellite and grid point (screening)
CPU_WINDOW_S = 9.0e-5     # per visibility window (rise/set bisection, culmination)
CPU_PAIR_S = 1.1e-6       # per (row, satellite in view): geometry, link budget, noise, filter
CPU_HANDOVER_S = 1.9e-4   # per handover: the event kernel's search and the records
CPU_RUN_S = 0.07          # per terminal and policy: setting up, summary with intervals
CPU_NAIVE_ROW_S = 1.5e-5  # naive kernel, per row and policy
HANDOVER_SCALE = 1.5      # handovers per pass = min(1, HANDOVER_SCALE / sqrt(mean in view))

MU_KM3_S2 = 398600.8      # WGS-72, as SGP4 uses
EARTH_RADIUS_KM = 6378.135
DEFAULT_ALTITUDE_KM = 550.0


@dataclass
class Part:
    """One place the memory goes: what, how many bytes, the keys that drive it."""

    what: str
    bytes: float
    keys: tuple[str, ...]


@dataclass
class Estimate:
    """Peak memory (bytes, all processes of the run) and CPU time (seconds, all cores)."""

    memory_b: float
    cpu_s: float
    parts: list[Part] = field(default_factory=list)

    def largest(self) -> Part:
        return max(self.parts, key=lambda p: p.bytes)

    def describe(self) -> str:
        return f"about {_size(self.memory_b)} of memory and {_duration(self.cpu_s)} of CPU time"


def _size(b: float) -> str:
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if b >= scale:
            return f"{b / scale:.3g} {unit}"
    return f"{b / 1e3:.3g} kB"


def _duration(s: float) -> str:
    if s >= 86400 * 365:
        return f"{s / (86400 * 365):.3g} years"
    if s >= 86400:
        return f"{s / 86400:.3g} days"
    if s >= 3600:
        return f"{s / 3600:.3g} h"
    if s >= 60:
        return f"{s / 60:.3g} min"
    return f"{s:.2g} s"


# ---- counting without building ----------------------------------------------------------------

def count_element_sets(path: str | Path, kind: str) -> int:
    """Element sets in a TLE or OMM file, counted from its lines (not parsed; 0 if unreadable).
    Cost: one pass over the file."""
    try:
        with open(path, encoding="utf-8-sig", errors="replace") as fh:
            if kind == "tle":
                return sum(1 for line in fh if line.startswith("1 "))
            text = fh.read()
    except OSError:
        return 0
    if str(path).lower().endswith(".xml") or text.lstrip().startswith("<"):
        return len(re.findall(r"<omm\b", text, flags=re.IGNORECASE))
    return max(0, sum(1 for line in text.splitlines() if line.strip()) - 1)


def shells(constellations: list[dict]) -> list[tuple[float, float, float | None, str]]:
    """(satellites, altitude km, inclination deg or None for uniform, key naming the count) per
    constellation table."""
    out = []
    for i, c in enumerate(constellations):
        where = f"constellation[{i + 1}]"
        kind = c.get("kind")
        if kind in ("walker-delta", "walker-star", "isotropic"):
            n, key = float(c["satellites"]), f"{where}.satellites"
        elif kind == "random-planes":
            n, key = float(c["planes"]) * float(c["per_plane"]), f"{where}.planes/per_plane"
        elif kind in ("tle", "omm"):
            n, key = float(count_element_sets(c["path"], kind)), f"{where}.path"
        else:
            n, key = 0.0, where
        inc = c.get("inclination_deg") if kind in ("walker-delta", "walker-star",
                                                   "random-planes") else None
        out.append((n, float(c.get("altitude_km") or DEFAULT_ALTITUDE_KM),
                    None if inc is None else float(inc), key))
    return out


def latitude_weight(lat_deg: float, psi_rad: float, inclination_deg: float | None) -> float:
    """How much denser than a uniform shell a shell of this inclination is over the latitude
    band a cap of half-angle ``psi`` at ``lat_deg`` spans (1 for a uniform shell)."""
    if inclination_deg is None:
        return 1.0
    s_i = abs(math.sin(math.radians(inclination_deg)))
    lo = max(-math.pi / 2, math.radians(lat_deg) - psi_rad)
    hi = min(math.pi / 2, math.radians(lat_deg) + psi_rad)
    uniform = (math.sin(hi) - math.sin(lo)) / 2.0
    if uniform <= 0.0:
        return 1.0
    if s_i < 1e-9:                          # equatorial: only a cap touching the equator
        return 1.0 / uniform if lo <= 0.0 <= hi else 0.0

    def cdf(x: float) -> float:
        return 0.5 + math.asin(max(-1.0, min(1.0, math.sin(x) / s_i))) / math.pi
    return (cdf(hi) - cdf(lo)) / uniform


def cap(altitude_km: float, floor_deg: float) -> tuple[float, float, float]:
    """(fraction of a uniform shell in view, sin psi, angular rate rad/s) above ``floor_deg``
    (see the module docstring for the formulas)."""
    r = EARTH_RADIUS_KM + max(altitude_km, 1.0)
    e = math.radians(max(floor_deg, -5.0))
    psi = max(0.0, math.acos(min(1.0, EARTH_RADIUS_KM * math.cos(e) / r)) - e)
    omega = math.sqrt(MU_KM3_S2 / r ** 3)
    return (1.0 - math.cos(psi)) / 2.0, math.sin(psi), omega


def _grid_step_s(scenario: dict, shell_list: list[tuple[float, float, str]]) -> float:
    """The SGP4 grid spacing the sky will use (see dwell.orbits.sky.default_step_s)."""
    if scenario.get("propagation_step_s"):
        return float(scenario["propagation_step_s"])
    alts = [a for n, a, _, _ in shell_list if n > 0] or [DEFAULT_ALTITUDE_KM]
    r = EARTH_RADIUS_KM + min(alts)
    period = 2 * math.pi * math.sqrt(r ** 3 / MU_KM3_S2)
    return float(min(300.0, max(10.0, math.floor(period / 19.0))))


# ---- the estimate -----------------------------------------------------------------------------

def beam_factors(scen) -> tuple[float, float]:
    """(row width, handover) multipliers of multi-beam layouts: a hex layout measures about 6
    cells per covering satellite (a 1.25-spacing disc holds 5.7 lattice points on average) and
    changes cell every few seconds, about 8 times as often as a single-beam satellite changes
    (both measured on the demo's 4.4 deg S-band layout; rough)."""
    hex_ = any(getattr(lay, "layout", "single") == "hex" for lay in getattr(scen, "layouts", []))
    return (6.0, 8.0) if hex_ else (1.0, 1.0)


def estimate_run(scen, *, workers: int = 1, width_factor: float | None = None,
                 kernel: str = "fast", n_policies: int | None = None,
                 measure: bool = True, streamed: bool = True) -> Estimate:
    """Estimate a checked scenario (built or not) run with ``workers`` processes.

    ``n_policies`` overrides the scenario's policy count (a sweep task runs many);
    ``measure=False`` estimates geometry only (``dwell passes``).  ``width_factor`` multiplies
    the columns of a measurement row (several beams per satellite would).  ``streamed=False``
    is a run that keeps every batch's tables in memory (a sweep task).  Cost: a few
    arithmetic operations per table (element files are counted line by line).
    """
    width_beams, handover_beams = beam_factors(scen)
    width_factor = width_beams if width_factor is None else width_factor
    sc = scen.scenario
    duration_s = float(sc["duration_s"])
    period_s = float(sc["measurement_period_s"])
    shell_list = shells(scen.constellations)
    n_sat = sum(n for n, _, _, _ in shell_list)
    count_keys = tuple(k for n, _, _, k in shell_list if n > 0) or ("[[constellation]]",)
    step_s = _grid_step_s(sc, shell_list)
    chunk_s = max(step_s, float(sc["chunk_s"]))
    n_chunks = max(1, math.ceil(duration_s / chunk_s - 1e-9))
    points = min(chunk_s, duration_s) / step_s + 1.0
    samples = duration_s / step_s + n_chunks
    terms = scen.terminals          # listed and generated by [[area]] tables alike
    n_term = len(terms)
    term_keys = ("[[terminal]]", "[[area]]") if getattr(scen, "areas", None) else \
        ("[[terminal]]",)
    n_pol = len(scen.policies) if n_policies is None else n_policies
    procs = max(1, min(workers, n_term))
    rows = math.ceil(duration_s / period_s - 1e-9)
    block_rows = max(64, math.ceil(900.0 / period_s))

    in_view, windows, handovers = [], [], 0.0
    for t in terms:
        f_sum = rate = 0.0
        for n, alt, inc, _ in shell_list:
            f, sin_psi, omega = cap(alt, float(t["min_elevation_deg"]))
            w = latitude_weight(float(t["lat_deg"]), math.asin(min(1.0, sin_psi)), inc)
            f_sum += n * f * w
            rate += n * sin_psi * omega / (2 * math.pi) * w
        in_view.append(f_sum)
        passes = rate * duration_s + f_sum * n_chunks           # and those cut at chunk edges
        windows.append(passes)
        if measure:
            handovers += n_pol * passes * handover_beams * min(
                1.0, HANDOVER_SCALE / math.sqrt(max(f_sum, 1e-9)))
    n_windows = sum(windows)
    touched = min(1.0, 0.7 + 0.03 * max(0, n_term - 1))

    parts = [Part("interpreter and libraries", BASE_B, ())]
    parts.append(Part(f"{n_sat:,.0f} satellites, propagated in chunks", procs * n_sat * (
        SAT_B + min(n_chunks, CHUNKS_KEPT) * points * (POINT_B + touched * SUB_B)),
        count_keys + ("scenario.chunk_s", "scenario.propagation_step_s")))
    # a run's batches each have a geometry of their own (dwell.run.run_tables)
    live = min(1.0, procs * TERMINAL_BATCH / max(1, n_term)) if measure else 1.0
    parts.append(Part("visibility windows", live * n_windows * WINDOW_B,
                      count_keys + ("scenario.duration_s",) + term_keys))
    pairs = 0.0
    if measure:
        widths = [(v + 2.0 * math.sqrt(v) + 1.0) * width_factor for v in in_view]
        # a process runs TERMINAL_BATCH terminals at once (dwell.run.run_tables): only their
        # buffers live together
        buffers = live * sum(4 * block_rows * w * FIELD_B for w in widths)
        temps = procs * block_rows * max(in_view, default=0.0) * width_factor * PAIR_B
        parts.append(Part(f"measurement rows of {n_term} terminals", buffers + temps,
                          ("scenario.measurement_period_s",) + term_keys + count_keys))
        pairs = sum(rows * v * width_factor for v in in_view)
    if measure and n_pol:
        # one batch in one process holds its tables; otherwise each process holds a batch's
        # and stores them part by part (dwell.run), the parent keeps the summaries and builds
        # the load tables a range of at most LOAD_EVENTS_PER_PASS events at a time
        kept = live if streamed else (1.0 + (procs > 1))
        held = (kept * max(handovers, n_term * n_pol) * RESULT_B + n_term * n_pol * SUMMARY_B
                + min(4.0 * handovers, LOAD_EVENTS_PER_PASS) * LOAD_EVENT_B)
        parts.append(Part(f"results of {n_term} terminals x {n_pol} policies", held,
                          ("scenario.duration_s",) + term_keys + ("[[policy]]",) + count_keys))
    buildings = 0.0
    for i, t in enumerate(terms):
        c = t.get("canyon")
        if not c:
            continue
        street_m = float(c.get("street_length_m", 2000.0))
        drive = t.get("drive") or {}
        covered_m = street_m + float(drive.get("speed_m_s", 0.0)) * duration_s
        n_b = 2.0 * float(c.get("buildings_per_km", 60.0)) * (covered_m + street_m) / 1000.0
        buildings += n_b
        where = _table_of(scen, i)
        parts.append(Part(f"street canyon of terminal {t['name']}", n_b * BUILDING_B,
                          (f"{where}.canyon.buildings_per_km",
                           f"{where}.canyon.street_length_m")
                          + ((f"{where}.drive.speed_m_s",) if drive else ())))
    batches = max(1, math.ceil(n_term / TERMINAL_BATCH)) if measure else 1   # SGP4 per batch
    cpu = (CPU_BASE_S + CPU_SAT_S * n_sat + CPU_SAMPLE_S * n_sat * samples * batches
           + CPU_SCREEN_S * n_term * n_sat * samples + CPU_WINDOW_S * n_windows
           + CPU_PAIR_S * pairs + CPU_HANDOVER_S * handovers + CPU_RUN_S * n_term * n_pol
           + 2e-7 * buildings * math.log2(max(2.0, buildings)))
    if kernel == "naive":
        cpu += CPU_NAIVE_ROW_S * rows * n_term * n_pol
    return Estimate(sum(p.bytes for p in parts), cpu, parts)


def _table_of(scen, i: int) -> str:
    """The table terminal ``i`` comes from: ``terminal[k]`` or, generated, ``area[k]``."""
    pop = getattr(scen, "population", None)
    if pop is None or i < pop.first_index:
        return f"terminal[{i + 1}]"
    names = [a["name"] for a in scen.areas]
    return f"area[{names.index(pop.area[i - pop.first_index]) + 1}]"


# ---- the machine ------------------------------------------------------------------------------

def available_memory_b() -> float | None:
    """Memory this process may still use: MemAvailable of /proc/meminfo (Linux), else the free
    physical pages (os.sysconf), capped by a cgroup v2 limit when one is set; None if unknown."""
    avail = None
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    avail = float(line.split()[1]) * 1024.0
                    break
    except OSError:
        pass
    if avail is None:
        try:
            avail = float(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
        except (ValueError, OSError, AttributeError):
            avail = None
    try:
        limit = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        used = float(Path("/sys/fs/cgroup/memory.current").read_text().strip())
        if limit != "max":
            room = float(limit) - used
            avail = room if avail is None else min(avail, room)
    except (OSError, ValueError):
        pass
    return avail


def refuse_if_too_big(est: Estimate, source: str, *, force: bool = False,
                      available_b: float | None = None, what: str = "the run") -> None:
    """Raise one InputError line when ``est`` needs more memory than is available, naming the
    keys of its largest part; ``force`` (the commands' ``--force``) goes ahead anyway."""
    if force:
        return
    avail = available_memory_b() if available_b is None else available_b
    if avail is None or est.memory_b <= avail:
        return
    big = est.largest()
    keys = ", ".join(big.keys) if big.keys else "the scenario"
    raise InputError(source, keys, None,
                     f"{what} needs {est.describe()}, but {_size(avail)} of memory is "
                     f"available; most goes to {big.what} ({_size(big.bytes)}); reduce it, or "
                     "add --force to go ahead anyway", show_value=False)
