"""Figures of a sweep: handover rate against each varied threshold per policy, the outage /
handover-rate trade-off, and worst-hour switches per policy."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from ..analysis import plots
from ..analysis.plots import plt
from .execute import combined_summary


def _axes(out: Path, df: pd.DataFrame) -> list[str]:
    """Numeric parameter columns of the sweep (from the summary files' metadata)."""
    from ..io.tables import read_metadata
    first = next(out.glob("summary-*.parquet"))
    params = json.loads(read_metadata(first).get("dwell.sweep_params", "{}"))
    cols = []
    for key in params:
        short = key.split(".")[-1]
        for c in (short, key):
            if c in df.columns and pd.api.types.is_numeric_dtype(df[c]) and df[c].nunique() > 1:
                cols.append(c)
                break
    return cols


def plot_sweep(out_dir: str | Path) -> list[Path]:
    out = Path(out_dir)
    df = combined_summary(out)
    if df.empty:
        raise FileNotFoundError(f"{out}: no finished runs to plot")
    figs = out / "_plots"
    written = []
    params = _axes(out, df)
    pols = list(dict.fromkeys(df["policy"].astype(str)))
    if params:
        fig, axes = plt.subplots(1, len(params), figsize=(5.5 * len(params), 4.2), squeeze=False)
        for ax, col in zip(axes[0], params):
            for pol in pols:
                g = df[df["policy"].astype(str) == pol].groupby(col)["handovers_per_hour"]
                m, s = g.mean(), g.std().fillna(0.0)
                ax.errorbar(m.index, m.values, yerr=s.values, marker="o", capsize=3, label=pol)
            ax.set_xlabel(col)
            ax.set_ylabel("handovers per hour (mean, +-1 sd over the other axes)")
            ax.grid(alpha=0.3)
        axes[0][-1].legend(fontsize=8)
        fig.suptitle("Handover rate against each varied parameter", y=1.02)
        plots._save(fig, figs / "handovers_vs_parameters.png")
        written.append(figs / "handovers_vs_parameters.png")
    fig, ax = plt.subplots(figsize=(7, 5))
    for pol in pols:
        g = df[df["policy"].astype(str) == pol]
        ax.scatter(g["handovers_per_hour"], 100 * g["outage_fraction"], s=18, label=pol, alpha=0.7)
    ax.set_xlabel("handovers per hour")
    ax.set_ylabel("outage (% of time, switching excluded)")
    ax.set_title("Trade-off: outage against handover rate (one point per run and terminal)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    plots._save(fig, figs / "outage_vs_handovers.png")
    written.append(figs / "outage_vs_handovers.png")
    fig, ax = plt.subplots(figsize=(7, 4.5))
    data = [df[df["policy"].astype(str) == p]["worst_hour_handovers"].to_numpy() for p in pols]
    ax.boxplot(data, tick_labels=pols)
    ax.set_ylabel("switches in the worst hour")
    ax.set_title("Worst-hour antenna switches per policy (over runs and terminals)")
    ax.grid(alpha=0.3, axis="y")
    plots._save(fig, figs / "worst_hour_switches.png")
    written.append(figs / "worst_hour_switches.png")
    return written


