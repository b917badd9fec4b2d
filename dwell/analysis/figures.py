"""Every figure of one run folder, checked and drawn in memory, then written (``dwell plot``)
or embedded (``dwell report``).

The options (terminal, policy, hour) are checked against the folder before anything is drawn,
and every figure is rendered before the first file is written, so a bad option or a failing
figure leaves the folder's existing plots as they were.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from ..io.atomic import write_bytes
from ..io.config import load_scenario
from ..io.errors import InputError
from . import plots, time_plots
from .plots import Figure
from .hourly import hourly_series, switch_intervals

MAX_PANELS = 6     # terminals side by side in one figure; more and only the chosen one is drawn
TRACE_COLUMNS = ("policy", "time_utc", "terminal", "cell", "satellite", "beam", "rsrp_dbm",
                 "rsrp_raw_dbm", "sinr_db", "serving")      # the trace contract (issue 11)


@dataclass(frozen=True)
class PlotChoice:
    """What the one-terminal, one-hour figures show."""
    terminal: str
    policy: str
    hour: int
    hours: int          # clock hours in the run (the last one may be cut)


@dataclass(frozen=True)
class Rendered:
    """One drawn figure: file name, what it shows (one line), PNG bytes."""
    name: str
    caption: str
    png: bytes


def _known(names: list[str], limit: int = 12) -> str:
    shown = ", ".join(names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


def check_choice(run_dir: str | Path, terminal: str | None, policy: str | None,
                 hour: int | None) -> PlotChoice:
    """Resolve and check the plot options against a run folder: a terminal, policy or hour
    the run does not have is an InputError naming the folder, the option and the value.
    Defaults: the last terminal, the first policy, hour 0.  Reads summary.parquet only."""
    run_dir = Path(run_dir)
    for name in ("summary.parquet", "links.parquet", "handovers.parquet", "outages.parquet",
                 "visible.parquet", "passes.parquet", "dwell_ccdf.parquet"):
        if not (run_dir / name).is_file():
            raise InputError(str(run_dir), None, None, f"not a complete run folder (no {name})")
    summary = pd.read_parquet(run_dir / "summary.parquet", columns=["terminal", "policy",
                                                                     "duration_h"])
    terms = plots.terminals_of(summary)
    pols = plots.policies_of(summary)
    hours = int(np.ceil(float(summary["duration_h"].iloc[0]) - 1e-9)) if len(summary) else 0
    if terminal is not None and terminal not in terms:
        raise InputError(str(run_dir), "--terminal", terminal,
                         f"no such terminal in this run (known: {_known(terms)})")
    if policy is not None and policy not in pols:
        raise InputError(str(run_dir), "--policy", policy,
                         f"no such policy in this run (known: {_known(pols)})")
    if hour is not None and not 0 <= int(hour) < hours:
        raise InputError(str(run_dir), "--hour", hour,
                         f"the run has hours 0 to {hours - 1} (it lasts {hours} h)")
    return PlotChoice(terminal or terms[-1], policy or pols[0], int(hour or 0), hours)


def render_run(run_dir: str | Path, choice: PlotChoice, comparison: pd.DataFrame | None = None,
               finish: Callable[[Figure], bytes] = plots.png_bytes) -> list[Rendered]:
    """Draw every figure of a run folder (in memory); ``comparison`` is the folder's
    :func:`dwell.analysis.compare.compare_run` if already computed; ``finish`` turns each
    figure into PNG bytes (checks hook in here).  Cost: a few seconds; the sky view recomputes
    the chosen hour's satellite tracks from run.toml."""
    from .compare import compare_run

    run_dir = Path(run_dir)
    scen = load_scenario(run_dir / "run.toml")
    start = pd.Timestamp(scen.epoch.start)
    duration_s = float(scen.scenario["duration_s"])
    summary = pd.read_parquet(run_dir / "summary.parquet")
    links = pd.read_parquet(run_dir / "links.parquet")
    handovers = pd.read_parquet(run_dir / "handovers.parquet")
    outages = pd.read_parquet(run_dir / "outages.parquet")
    visible = pd.read_parquet(run_dir / "visible.parquet")
    terms, pols = plots.terminals_of(summary), plots.policies_of(summary)
    panel_terms = terms if len(terms) <= MAX_PANELS else [choice.terminal]
    out: list[Rendered] = []

    def add(name: str, caption: str, fig) -> None:
        out.append(Rendered(name, caption, finish(fig)))

    add("dwell_ccdf.png", "Dwell time per link, complementary CDF per policy and terminal.",
        plots.ccdf_figure(pd.read_parquet(run_dir / "dwell_ccdf.parquet")))
    add("rates.png", "Handover rate and outage fraction per policy and terminal, with 95 % "
        "intervals.", plots.rates_figure(summary))
    cmp = compare_run(run_dir) if comparison is None else comparison
    means = {r["terminal"]: r["analytic"] for _, r in cmp.iterrows()
             if r["quantity"] == "mean in view" and np.isfinite(r["analytic"])}
    add("in_view.png", "Satellites in view over time, with the time average and the analytic "
        "mean where one applies.", plots.visible_figure(visible, means, start))
    pairs = list(zip(summary["terminal"].astype(str), summary["policy"].astype(str)))
    pairs = [p for p in pairs if p[0] in panel_terms]
    add("hourly.png", "Handovers, outage and switching time per clock hour.",
        time_plots.hourly_figure(hourly_series(handovers, outages, duration_s, start, pairs)))
    add("switch_intervals.png", "Distribution of the time between successive handovers.",
        time_plots.intervals_figure(switch_intervals(handovers, start), panel_terms, pols))
    add("slew.png", "Distribution of the antenna slew angle per satellite change.",
        time_plots.slew_figure(handovers, panel_terms, pols))
    add("timeline.png", f"Serving satellite per policy, {choice.terminal}, hour {choice.hour}.",
        plots.timeline_figure(visible, links, handovers, choice.terminal, choice.hour, start))
    add("sky.png", f"Sky view of the passes and of the serving segments under {choice.policy}, "
        f"{choice.terminal}, hour {choice.hour}.",
        _sky(scen, pd.read_parquet(run_dir / "passes.parquet"), links, choice, start))
    trace_file = run_dir / "trace.parquet"
    if trace_file.is_file():
        trace = pd.read_parquet(trace_file)
        missing = [c for c in TRACE_COLUMNS if c not in trace.columns]
        if missing:
            raise InputError(str(trace_file), None, None,
                             "not a measurement trace (no column " + ", ".join(missing) + ")")
        traced, traced_pols = plots.terminals_of(trace), plots.policies_of(trace)
        term = choice.terminal if choice.terminal in traced else traced[0] if traced else None
        pol = choice.policy if choice.policy in traced_pols else \
            traced_pols[0] if traced_pols else None
        if term is not None and pol is not None:     # the trace holds one terminal (--trace)
            add("trace.png", f"Measurement trace of {term} under {pol}, hour "
                f"{choice.hour}: filtered RSRP per cell, serving cell highlighted, handovers.",
                time_plots.trace_figure(trace, handovers, term, pol, choice.hour, start))
    return out


def write_rendered(figures: list[Rendered], folder: Path) -> list[Path]:
    """Write drawn figures into ``folder``, each file atomically."""
    paths = []
    for f in figures:
        write_bytes(folder / f.name, f.png)
        paths.append(folder / f.name)
    return paths


def plot_run(run_dir: str | Path, terminal: str | None = None, hour: int | None = None,
             policy: str | None = None) -> list[Path]:
    """``dwell plot`` of a run folder: check the options, draw everything, then write the
    PNG files into ``run_dir/plots``.  Returns the paths written."""
    run_dir = Path(run_dir)
    choice = check_choice(run_dir, terminal, policy, hour)
    return write_rendered(render_run(run_dir, choice), run_dir / "plots")


def _sky(scen, passes, links, choice: PlotChoice, start):
    from ..orbits.frames import EarthOrientation
    from ..orbits.look import look
    from ..orbits.sky import Sky

    terminal, hour, policy = choice.terminal, choice.hour, choice.policy
    site = scen.sites[scen.terminal_names().index(terminal)]
    duration = float(scen.scenario["duration_s"])
    t0, t1 = hour * 3600.0, min((hour + 1) * 3600.0, duration)
    sc = scen.scenario
    sky = Sky(scen.constellation, scen.epoch, duration, step_s=sc["propagation_step_s"],
              chunk_s=sc["chunk_s"])
    earth = EarthOrientation(scen.epoch, sc["ut1_utc_s"], sc["earth_rotation"])
    index = {n: i for i, n in enumerate(scen.constellation.names)}
    sec = lambda c: (c - start).dt.total_seconds().to_numpy()  # noqa: E731
    p = passes[passes["terminal"].astype(str) == terminal]
    ps, pe = sec(p["rise_utc"]), sec(p["set_utc"])
    keep = (pe > t0) & (ps < t1)

    def track(sat_name, a, b):
        t = np.arange(max(a, t0), min(b, t1), 5.0)
        if t.size < 2:
            return None
        r, _ = sky.states(np.full(t.size, index[sat_name]), t, velocity=False)
        pos, _, basis = site.teme(t, earth)
        lk = look(r, None, pos, None, basis)
        return lk["azimuth_deg"], lk["elevation_deg"]

    try:
        tracks = {}
        for j, (s, a, b) in enumerate(zip(p["satellite"].astype(str)[keep], ps[keep], pe[keep])):
            tr = track(s, a, b)
            if tr is not None:
                tracks[f"{s}#{j}"] = tr
        g = links[(links["terminal"].astype(str) == terminal)
                  & (links["policy"].astype(str) == policy)]
        ls, le = sec(g["start_utc"]), sec(g["end_utc"])
        serving = {}
        for j, (s, a, b) in enumerate(zip(g["satellite"].astype(str), ls, le)):
            if b > t0 and a < t1:
                tr = track(s, a, b)
                if tr is not None:
                    serving[f"{s}#{j}"] = tr
    finally:
        sky.close()
    mask_az = mask_el = None
    if site.obstructions:
        mask_az = np.arange(0.0, 360.0, 0.5)
        mask_el = np.maximum(site.mask_deg(mask_az, np.full(mask_az.shape, 0.5 * (t0 + t1))), 0.0)
    return plots.sky_figure(tracks, mask_az, mask_el, site.floor_deg, serving,
                            f"{terminal}, hour {hour}: passes (grey) and serving segments "
                            f"under {policy} (blue)")
