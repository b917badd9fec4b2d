"""``dwell bench``: speed and memory of the engine, each figure a ratio against a reference
measured side by side in the same process (the machine is shared and noisy).

Cases and targets (see DEVELOPERS.md): pass table for one terminal against skyfield's
per-satellite search (>= 8x, events within 0.5 s); many terminals with shared propagation
against the reference looped (>= 50x); the event kernel against the naive per-measurement
kernel (>= 20x, identical handovers); the whole demo run against one SGP4 pass of its shell on
a 60 s grid (<= 6x); peak memory of a week-long and of a 10,000-satellite run (< 2 GiB); a
10,000-terminal area over one day (30 min on 2 cores, 4 GiB; a small area in ``--quick``, held
to its share of that budget); a scaling table with fitted growth exponents, up to 10,000
terminals.  ``--quick`` runs small versions in a few minutes; the full set takes hours.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

QUICK = [
    ("passes-one", {"duration_s": 21600.0, "satellites": 720}),
    ("passes-many", {"duration_s": 10800.0, "satellites": 720, "n_terminals": 10,
                     "ref_terminals": 2}),
    ("kernel", {"duration_s": 10800.0, "satellites": 720}),
    ("kernel", {"duration_s": 10800.0, "satellites": 720, "shadowing_std_db": 0.0,
                "measurement_noise_db": 0.0, "hysteresis_db": 2.0}),
    ("memory", {"kind": "week-1-terminal", "duration_s": 21600.0}),
    *[("variant", {"variant": v, "duration_s": 10800.0, "satellites": 720})
      for v in ("procedure", "beams-19", "interference")],
    ("scale", {"axis": "terminals", "value": 1,
               "base": {"satellites": 720, "terminals": 1, "duration_s": 7200.0}}),
    ("scale", {"axis": "terminals", "value": 8,
               "base": {"satellites": 720, "terminals": 1, "duration_s": 7200.0}}),
    ("area", {"n_terminals": 16, "duration_s": 3600.0}),
]

FULL_BASE = {"satellites": 1584, "terminals": 1, "duration_s": 86400.0}
FULL = [
    ("passes-one", {"duration_s": 86400.0, "satellites": 1584}),
    ("passes-many", {"duration_s": 86400.0, "satellites": 1584, "n_terminals": 100,
                     "ref_terminals": 10}),
    ("kernel", {"duration_s": 86400.0, "satellites": 1584}),
    ("kernel", {"duration_s": 86400.0, "satellites": 1584, "shadowing_std_db": 0.0,
                "measurement_noise_db": 0.0, "hysteresis_db": 2.0}),
    *[("variant", {"variant": v, "duration_s": 86400.0, "satellites": 1584})
      for v in ("procedure", "beams-19", "interference")],
    ("demo", {"config": "configs/demo.toml"}),
    ("stress-terminals", {"n_terminals": 200, "duration_s": 86400.0}),
    ("area", {"n_terminals": 10_000, "duration_s": 86400.0}),
    ("memory", {"kind": "week-1-terminal", "duration_s": 7 * 86400.0}),
    ("memory", {"kind": "10000-satellites", "duration_s": 86400.0}),
] + [("scale", {"axis": "satellites", "value": v, "base": FULL_BASE})
     for v in (504, 1584, 5040, 10080)] + \
    [("scale", {"axis": "terminals", "value": v, "base": FULL_BASE})
     for v in (1, 10, 100, 1000, 10_000)] + \
    [("scale", {"axis": "duration_s", "value": v, "base": FULL_BASE})
     for v in (3600.0, 21600.0, 86400.0, 7 * 86400.0)]


def run_case(name: str, kwargs: dict) -> dict:
    """Run one case in a fresh interpreter; returns its JSON result (or the error)."""
    proc = subprocess.run([sys.executable, "-m", "dwell.bench.cases", name, json.dumps(kwargs)],
                          capture_output=True, text=True)
    for line in proc.stdout.splitlines():
        if line.startswith("BENCH-RESULT "):
            return json.loads(line[len("BENCH-RESULT "):])
    tail = (proc.stderr or proc.stdout).strip().splitlines()[-1:] or ["no output"]
    return {"case": name, "error": tail[0]}


def growth_exponents(rows: list[dict]) -> dict[str, float]:
    """Least-squares slope of log(time) on log(size) per scaling axis."""
    out = {}
    for axis in ("satellites", "terminals", "duration_s"):
        pts = [(r["value"], r["passes_s"]) for r in rows if r.get("axis") == axis and "passes_s" in r]
        if len(pts) >= 2:
            x, y = np.log([p[0] for p in pts]), np.log([p[1] for p in pts])
            out[axis] = float(np.polyfit(x, y, 1)[0])
    return out


def run_bench(quick: bool, progress: Callable[[str], None]) -> tuple[pd.DataFrame, dict]:
    rows = []
    for name, kwargs in (QUICK if quick else FULL):
        label = name + (f" {kwargs.get('axis')}={kwargs.get('value')}" if name == "scale" else "")
        progress(f"bench: {label} ...")
        rows.append(run_case(name, kwargs))
    exps = growth_exponents(rows)
    return pd.DataFrame(rows), exps


def format_bench(df: pd.DataFrame, exps: dict) -> str:
    lines = [f"{'case':<38} {'ours s':>9} {'ref s':>9} {'ratio':>8} {'target':>8} {'peak MiB':>9}  notes"]
    lines.append("-" * len(lines[0]))
    for _, r in df.iterrows():
        if isinstance(r.get("error"), str):
            lines.append(f"{r['case']:<38} error: {r['error']}")
            continue
        def g(k):
            v = r.get(k)
            return v if isinstance(v, (int, float)) and not (isinstance(v, float) and math.isnan(v)) else None
        ours, ref, ratio, target = g("ours_s"), g("reference_s"), g("ratio"), g("target_ratio")
        notes = []
        for key in ("max_event_diff_s", "unmatched_events", "same_handovers", "handovers",
                    "mean_dwell_s", "satellites", "passes_s", "run_1_terminal_s",
                    "per_terminal_day_s", "worker_peak_mib"):
            if key in r and r[key] is not None and not (isinstance(r[key], float) and math.isnan(r[key])):
                notes.append(f"{key}={r[key]:.3g}" if isinstance(r[key], float) else f"{key}={r[key]}")
        name = r["case"] + (f" {r['value']:g}" if "value" in r and g("value") is not None else "")
        fmt = lambda v, f: (f % v) if v is not None else "-"  # noqa: E731
        lines.append(f"{name:<38} {fmt(ours, '%9.2f')} {fmt(ref, '%9.2f')} {fmt(ratio, '%8.1f')} "
                     f"{fmt(target, '%8.1f')} {fmt(g('peak_mib'), '%9.0f')}  {' '.join(notes)}")
    if exps:
        lines.append("growth exponents (time ~ size^k, pass finding): " +
                     ", ".join(f"{k}: {v:.2f}" for k, v in exps.items()))
    return "\n".join(lines) + "\n"


def write_bench(df: pd.DataFrame, exps: dict, out_dir: Path) -> None:
    from ..io.atomic import write_text
    from ..io.tables import write_frame
    out_dir.mkdir(parents=True, exist_ok=True)
    flat = df.copy()
    for col in flat.columns:
        if flat[col].dtype == object:
            flat[col] = flat[col].map(lambda v: json.dumps(v) if isinstance(v, dict) else v)
    write_frame(flat, out_dir / "bench.parquet")
    write_text(out_dir / "bench.json", json.dumps({"cases": df.to_dict(orient="records"),
                                                   "growth_exponents": exps}, indent=2,
                                                  default=str))
