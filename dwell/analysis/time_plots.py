"""Figures over time and of distributions (matplotlib): per-hour series, intervals between
switches, slew angles, and an hour of the measurement trace.  Each returns a Figure."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from .hourly import seconds_since
from .plots import plt, policies_of, policy_colours, terminals_of


def _panels(n: int, rows: int, width: float, height: float, **kw):
    fig, axes = plt.subplots(rows, n, figsize=(width * n + 1.8, height * rows), squeeze=False,
                             layout="constrained", **kw)
    return fig, axes


def _legend_below(ax) -> None:
    """Below the panel, clear of the curves (per-panel labels carry per-panel numbers)."""
    ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2,
              title="policy", title_fontsize=8)


def _outside_legend(ax, title: str | None = "policy") -> None:
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.02, 1.0), title=title)


def hourly_figure(series: pd.DataFrame) -> Figure:
    """Handovers, outage and switching per clock hour (rows) per terminal (columns), one line
    per policy.  ``series`` is :func:`dwell.analysis.hourly.hourly_series`; a cut last hour
    is scaled to a full hour."""
    terms, pols = terminals_of(series), policies_of(series)
    colours = policy_colours(pols)
    fig, axes = _panels(len(terms), 3, 5.0, 2.4, sharex=True)
    rows = (("handovers", "handovers per hour"),
            ("outage_s", "outage (s per hour,\nswitching excluded)"),
            ("switching_s", "switching (s per hour)"))
    for j, term in enumerate(terms):
        d = series[series["terminal"] == term]
        for pol in pols:
            g = d[d["policy"] == pol]
            if g.empty:
                continue
            edges = np.append(g["hour"].to_numpy(), g["hour"].iloc[-1]
                              + g["hour_s"].iloc[-1] / 3600.0)
            per_full_hour = 3600.0 / g["hour_s"].to_numpy(dtype=float)
            for i, (col, _) in enumerate(rows):
                axes[i, j].stairs(g[col].to_numpy(dtype=float) * per_full_hour, edges,
                                  color=colours[pol], lw=1.3, label=pol, baseline=None)
        axes[0, j].set_title(term)
        axes[-1, j].set_xlabel("hour since scenario start")
        for i, (_, label) in enumerate(rows):
            axes[i, j].set_ylim(bottom=0)
            axes[i, j].grid(alpha=0.3)
            if j == 0:
                axes[i, j].set_ylabel(label, fontsize=9)
    _outside_legend(axes[0, -1])
    fig.suptitle("Per clock hour: handovers, outage and switching time, per terminal and policy")
    return fig


def _inter_satellite(handovers: pd.DataFrame) -> pd.DataFrame:
    """Satellite changes only, where the table tells beam changes apart (``scope``)."""
    if "scope" in handovers.columns:
        return handovers[handovers["scope"].astype(str) != "intra-satellite"]
    return handovers


def intervals_figure(intervals: pd.DataFrame, terminals: list[str], policies: list[str]) -> Figure:
    """Distribution (empirical CDF, log time axis) of the time between successive handovers
    of one terminal under one policy, one panel per terminal.  ``intervals`` is
    :func:`dwell.analysis.hourly.switch_intervals`."""
    colours = policy_colours(policies)
    fig, axes = _panels(len(terminals), 1, 5.0, 4.0, sharey=True)
    for ax, term in zip(axes[0], terminals):
        d = intervals[intervals["terminal"] == term]
        drawn = False
        for pol in policies:
            x = d.loc[d["policy"] == pol, "interval_s"].to_numpy(dtype=float)
            x = x[x > 0]
            if x.size:
                ax.ecdf(x, color=colours[pol], label=f"{pol} (median {np.median(x):.0f} s)")
                drawn = True
        ax.set_xscale("log")
        ax.set_xlabel("time from one handover to the next (s)")
        ax.set_title(term)
        ax.grid(alpha=0.3, which="both")
        if drawn:
            _legend_below(ax)
        else:
            ax.text(0.5, 0.5, "fewer than two handovers", ha="center", transform=ax.transAxes)
    axes[0, 0].set_ylabel("fraction of intervals <= x")
    fig.suptitle("Intervals between handovers (switch to switch): empirical CDF")
    return fig


def slew_figure(handovers: pd.DataFrame, terminals: list[str], policies: list[str]) -> Figure:
    """Distribution (empirical CDF) of the antenna slew angle at each satellite change, one
    panel per terminal, one line per policy."""
    colours = policy_colours(policies)
    h = _inter_satellite(handovers)
    fig, axes = _panels(len(terminals), 1, 5.0, 4.0, sharey=True)
    finite = h["slew_angle_deg"].to_numpy(dtype=float)
    finite = finite[np.isfinite(finite)]
    top_deg = min(180.0, 30.0 * np.ceil(finite.max() / 30.0)) if finite.size else 180.0
    for ax, term in zip(axes[0], terminals):
        d = h[h["terminal"].astype(str) == term]
        drawn = False
        for pol in policies:
            x = d.loc[d["policy"].astype(str) == pol, "slew_angle_deg"].to_numpy(dtype=float)
            x = x[np.isfinite(x)]
            if x.size:
                ax.ecdf(x, color=colours[pol],
                        label=f"{pol} (95th pct {np.percentile(x, 95):.0f}°)")
                drawn = True
        ax.set_xlim(0, top_deg)
        ax.set_xticks(np.arange(0, top_deg + 1, 30 if top_deg > 60 else 10))
        ax.set_xlabel("slew angle between old and new satellite (deg)")
        ax.set_title(term)
        ax.grid(alpha=0.3)
        if drawn:
            _legend_below(ax)
        else:
            ax.text(0.5, 0.5, "no satellite change", ha="center", transform=ax.transAxes)
    axes[0, 0].set_ylabel("fraction of satellite changes <= x")
    fig.suptitle("Antenna slew angle per satellite change (terminal re-pointing): empirical CDF")
    return fig


def _segments(t: np.ndarray, y: np.ndarray, same: np.ndarray, max_gap: float) -> np.ndarray:
    """Line pieces joining successive samples of one series (``same`` marks a successor of the
    same series) unless they are more than ``max_gap`` apart: an (n, 2, 2) array."""
    ok = same & (np.diff(t) <= max_gap)
    a = np.flatnonzero(ok)
    return np.stack([np.column_stack([t[a], y[a]]), np.column_stack([t[a + 1], y[a + 1]])], axis=1)


def trace_figure(trace: pd.DataFrame, handovers: pd.DataFrame, terminal: str, policy: str,
                 hour: int, start: pd.Timestamp) -> Figure:
    """One hour of the measurement trace of one terminal under one policy: L3-filtered RSRP of
    every measured cell (grey), the serving cell's highlighted (colour changes at each change
    of cell), its raw RSRP as dots, its SINR below, and the handover instants as vertical
    lines.  ``trace`` follows the trace contract (policy, time_utc, terminal, cell, satellite,
    beam, rsrp_dbm, rsrp_raw_dbm, sinr_db, serving).  Cost: O(rows log rows) plus drawing."""
    t0 = hour * 3600.0
    tr = trace[(trace["terminal"].astype(str) == terminal)
               & (trace["policy"].astype(str) == policy)]
    minute = (seconds_since(tr["time_utc"], start) - t0) / 60.0
    keep = (minute >= 0) & (minute <= 60)
    tr = tr[keep].assign(minute=minute[keep], cell_name=tr["cell"].astype(str)[keep])
    tr = tr.sort_values(["cell_name", "minute"], kind="stable")
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(13, 7.2), sharex=True, layout="constrained",
                                 gridspec_kw={"height_ratios": [2.2, 1]})
    t = tr["minute"].to_numpy(dtype=float)
    step = np.diff(np.unique(t))
    max_gap = 1.5 * (float(np.median(step)) if step.size else 1.0)   # a missed measurement
    cells = tr["cell_name"].to_numpy()
    same = cells[1:] == cells[:-1]
    a1.add_collection(LineCollection(_segments(t, tr["rsrp_dbm"].to_numpy(dtype=float), same,
                                               max_gap), colors="0.6", linewidths=0.7))
    sv = tr[tr["serving"].astype(bool)].sort_values("minute", kind="stable")
    st = sv["minute"].to_numpy(dtype=float)
    s_cells = sv["cell_name"].to_numpy()
    run_id = np.concatenate([[0], np.cumsum(s_cells[1:] != s_cells[:-1])]) if st.size else st
    s_same = s_cells[1:] == s_cells[:-1]
    segs = _segments(st, sv["rsrp_dbm"].to_numpy(dtype=float), s_same, max_gap)
    shade = np.where(run_id[:-1][s_same & (np.diff(st) <= max_gap)] % 2 == 0, "tab:blue",
                     "tab:orange") if st.size else []
    a1.add_collection(LineCollection(segs, colors=shade, linewidths=2.2))
    a1.plot(st, sv["rsrp_raw_dbm"].to_numpy(dtype=float), ".", ms=1.5, color="k", alpha=0.35)
    sinr = _segments(st, sv["sinr_db"].to_numpy(dtype=float), s_same, max_gap)
    a2.add_collection(LineCollection(sinr, colors="tab:green", linewidths=1.2))
    h = handovers[(handovers["terminal"].astype(str) == terminal)
                  & (handovers["policy"].astype(str) == policy)]
    hm = (seconds_since(h["time_utc"], start) - t0) / 60.0
    inside = (hm >= 0) & (hm <= 60)
    intra = (h["scope"].astype(str) == "intra-satellite").to_numpy() if "scope" in h.columns \
        else np.zeros(len(h), bool)
    for ax in (a1, a2):
        ax.vlines(hm[inside & ~intra], 0, 1, transform=ax.get_xaxis_transform(), colors="crimson",
                  linewidths=0.8, label="handover (satellite change)")
        if intra.any():
            ax.vlines(hm[inside & intra], 0, 1, transform=ax.get_xaxis_transform(),
                      colors="crimson", linewidths=0.6, linestyles=":",
                      label="handover (beam change, same satellite)")
        ax.grid(alpha=0.3)
    for ax, vals in ((a1, tr[["rsrp_dbm", "rsrp_raw_dbm"]].to_numpy(dtype=float).ravel()),
                     (a2, sv["sinr_db"].to_numpy(dtype=float))):
        vals = vals[np.isfinite(vals)]
        if vals.size:
            pad = 0.05 * max(1.0, float(vals.max() - vals.min()))
            ax.set_ylim(float(vals.min()) - pad, float(vals.max()) + pad)
    a1.set_xlim(0, 60)
    a1.set_ylabel("RSRP (dBm)")
    a2.set_ylabel("serving SINR (dB)")
    a2.set_xlabel(f"minutes after the start of hour {hour}")
    handles = [Line2D([], [], color="0.6", lw=0.7, label="measured cells (L3-filtered RSRP)"),
               Line2D([], [], color="tab:blue", lw=2.2,
                      label="serving cell (colour changes with the cell)"),
               Line2D([], [], color="k", marker=".", ls="", alpha=0.5,
                      label="serving cell, raw RSRP (before L3 filter)"),
               Line2D([], [], color="crimson", lw=0.8, label="handover (satellite change)")]
    if intra.any():
        handles.append(Line2D([], [], color="crimson", lw=0.6, ls=":",
                              label="handover (beam change, same satellite)"))
    a1.legend(handles=handles, fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    a2.legend(handles=[Line2D([], [], color="tab:green", lw=1.2, label="serving SINR")],
              fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    n_cells = len(set(cells))
    a1.set_title(f"{terminal} under {policy}, hour {hour}: measurement trace of the serving cell "
                 f"and the strongest neighbours ({n_cells} cells measured)")
    return fig
