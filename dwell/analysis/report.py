"""``dwell plot`` for one run folder: every figure from its tables (and, for the sky view,
the satellite tracks of the chosen hour recomputed from ``run.toml``)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..io.config import load_scenario
from ..orbits.frames import EarthOrientation
from ..orbits.look import look
from ..orbits.sky import Sky
from . import plots
from .compare import compare_run

FIGURES = ("dwell_ccdf.png", "rates.png", "in_view.png", "timeline.png", "sky.png")


def plot_run(run_dir: str | Path, terminal: str | None = None, hour: int | None = None,
             policy: str | None = None) -> list[Path]:
    run_dir = Path(run_dir)
    out = run_dir / "plots"
    scen = load_scenario(run_dir / "run.toml")
    start = pd.Timestamp(scen.epoch.start)
    summary = pd.read_parquet(run_dir / "summary.parquet")
    written = []
    plots.ccdf_plot(pd.read_parquet(run_dir / "dwell_ccdf.parquet"), out / "dwell_ccdf.png")
    plots.rates_plot(summary, out / "rates.png")
    cmp = compare_run(run_dir)
    means = {r["terminal"]: r["analytic"] for _, r in cmp.iterrows()
             if r["quantity"] == "mean in view" and np.isfinite(r["analytic"])}
    visible = pd.read_parquet(run_dir / "visible.parquet")
    plots.visible_plot(visible, means, start, out / "in_view.png")
    written += [out / "dwell_ccdf.png", out / "rates.png", out / "in_view.png"]
    names = scen.terminal_names()
    terminal = terminal or names[-1]
    hour = 0 if hour is None else int(hour)
    passes = pd.read_parquet(run_dir / "passes.parquet")
    links = pd.read_parquet(run_dir / "links.parquet")
    handovers = pd.read_parquet(run_dir / "handovers.parquet")
    plots.timeline_plot(visible, links, handovers, terminal, hour, start, out / "timeline.png")
    policy = policy or str(links["policy"].iloc[0])
    _sky(scen, passes, links, terminal, hour, policy, start, out / "sky.png")
    written += [out / "timeline.png", out / "sky.png"]
    return written


def _sky(scen, passes, links, terminal, hour, policy, start, path) -> None:
    k = scen.terminal_names().index(terminal)
    site = scen.sites[k]
    duration = float(scen.scenario["duration_s"])
    t0, t1 = hour * 3600.0, min((hour + 1) * 3600.0, duration)
    sc = scen.scenario
    sky = Sky(scen.constellation, scen.epoch, duration, step_s=sc["propagation_step_s"],
              chunk_s=sc["chunk_s"])
    earth = EarthOrientation(scen.epoch, sc["ut1_utc_s"], sc["earth_rotation"])
    names = scen.constellation.names
    index = {n: i for i, n in enumerate(names)}
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

    tracks = {}
    for j, (s, a, b) in enumerate(zip(p["satellite"].astype(str)[keep], ps[keep], pe[keep])):
        tr = track(s, a, b)
        if tr is not None:
            tracks[f"{s}#{j}"] = tr
    g = links[(links["terminal"].astype(str) == terminal) & (links["policy"].astype(str) == policy)]
    ls, le = sec(g["start_utc"]), sec(g["end_utc"])
    serving = {}
    for j, (s, a, b) in enumerate(zip(g["satellite"].astype(str), ls, le)):
        if b > t0 and a < t1:
            tr = track(s, a, b)
            if tr is not None:
                serving[f"{s}#{j}"] = tr
    mask_az = mask_el = None
    if site.obstructions:
        mask_az = np.arange(0.0, 360.0, 0.5)
        mask_el = np.maximum(site.mask_deg(mask_az, np.full(mask_az.shape, 0.5 * (t0 + t1))), 0.0)
    plots.sky_plot(tracks, mask_az, mask_el, site.floor_deg, serving,
                   f"{terminal}, hour {hour}: passes (grey), serving under {policy} (blue)", path)
    sky.close()
