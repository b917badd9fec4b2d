"""Figures of a sweep, per terminal (and per area: its terminals' weighted means): handover
rate against each swept value, and trade-off
curves (outage, ping-pong and radio link failures against handover rate) with every point
labelled by its swept value and lines joining the points in sweep order; the worst-hour
switches per policy.  Error bars are the summary's 95 % intervals (``*_lo``/``*_hi``), never
standard deviations, and never reach below zero.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from ..analysis.analytic import poisson_rate_interval
from ..analysis.population import weighted_mean
from ..analysis.figures import Rendered, write_rendered
from ..analysis.plots import Figure, plt, png_bytes
from ..io.errors import InputError
from .execute import combined_summary

MAX_TERMINALS = 12      # per-terminal figures drawn without --terminal
UNITS = {"_db": "dB", "_deg": "deg", "_s": "s", "_km": "km", "_m": "m", "_hz": "Hz",
         "_ghz": "GHz", "_mhz": "MHz", "_m_s": "m/s", "_deg_s": "deg/s", "_dbi": "dBi",
         "_dbw_mhz": "dBW/MHz"}


@dataclass
class SweptAxis:
    """One axis of the sweep as the combined summary holds it."""
    key: str                 # full key path, e.g. policy.*.hysteresis_db
    column: str              # the summary column holding its value
    order: list              # values in sweep order
    numeric: bool

    @property
    def label(self) -> str:
        unit = next((u for suffix, u in sorted(UNITS.items(), key=lambda kv: -len(kv[0]))
                     if self.key.endswith(suffix)), None)
        return f"{self.key} ({unit})" if unit else self.key

    @property
    def short(self) -> str:
        return self.key.split(".")[-1]


def _column_of(key: str, df: pd.DataFrame) -> str | None:
    """The summary column of an axis: the full key path, or the older short names."""
    short = key.split(".")[-1] if key not in ("terminal", "policy") else f"{key}_set"
    for c in (key, short, re.sub(r"\W+", "_", key)):
        if c in df.columns and c not in ("terminal", "policy"):
            return c
    return None


def _file_order(out: Path) -> dict[str, list]:
    """Axis values in the order the sweep file lists them (empty where it cannot be read)."""
    from ..io.config import read_toml
    try:
        raw = read_toml(out / "_sweep.toml")
    except InputError:
        return {}
    from .spec import generate_sites
    order = {}
    for t in raw.get("axis", []) if isinstance(raw.get("axis"), list) else []:
        if isinstance(t, dict) and t.get("key") == "terminal" and isinstance(t.get("sites"), dict):
            try:           # the generated sites' names depend on the generator only
                order["terminal"] = [v[0]["name"] for v in
                                     generate_sites(t["sites"], {}, "_sweep.toml", "axis")]
            except (InputError, KeyError, TypeError, ValueError):
                pass
        elif isinstance(t, dict) and isinstance(t.get("values"), list):
            order[str(t.get("key"))] = [float(v) if isinstance(v, (int, float))
                                        and not isinstance(v, bool) else v for v in t["values"]]
    return order


def swept_axes(out: Path, df: pd.DataFrame) -> list[SweptAxis]:
    """The axes whose values vary across the combined summary, in sweep-file order."""
    from ..io.tables import read_metadata
    first = next(out.glob("summary-*.parquet"))
    params = json.loads(read_metadata(first).get("dwell.sweep_params", "{}"))
    order = _file_order(out)
    axes = []
    for key in params:
        col = _column_of(key, df)
        if col is None or df[col].nunique(dropna=False) < 2:
            continue
        numeric = pd.api.types.is_numeric_dtype(df[col]) and key not in ("terminal", "policy")
        seen = list(dict.fromkeys(df[col].tolist()))
        listed = [v for v in order.get(key, []) if v in seen]
        rest = sorted(v for v in seen if v not in listed) if numeric else \
            [v for v in seen if v not in listed]
        axes.append(SweptAxis(key, col, listed + rest, numeric))
    return axes


def _metrics(g: pd.DataFrame) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """(value, lo, hi) per plotted quantity, from the summary's interval columns (the failure
    rate's exact Poisson interval from its count, as the summary computes the others; none
    for the weighted means of an area, whose counts are not Poisson)."""
    hours = g["duration_h"].to_numpy(dtype=float)
    rlf = g["radio_link_failures"].to_numpy(dtype=float)
    if AREA_MEAN in g.columns:
        rlf_lo = rlf_hi = np.full(rlf.shape, np.nan)
    else:
        rlf_lo, rlf_hi = poisson_rate_interval(rlf, hours)
    return {
        "ho": (g["handovers_per_hour"].to_numpy(dtype=float),
               g["handovers_per_hour_lo"].to_numpy(dtype=float),
               g["handovers_per_hour_hi"].to_numpy(dtype=float)),
        "outage": (100 * g["outage_fraction"].to_numpy(dtype=float),
                   100 * g["outage_fraction_lo"].to_numpy(dtype=float),
                   100 * g["outage_fraction_hi"].to_numpy(dtype=float)),
        "pingpong": (g["ping_pongs"].to_numpy(dtype=float) / hours,
                     g["ping_pong_per_hour_lo"].to_numpy(dtype=float),
                     g["ping_pong_per_hour_hi"].to_numpy(dtype=float)),
        "rlf": (rlf / hours, np.asarray(rlf_lo, float), np.asarray(rlf_hi, float)),
    }


def _err(v: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Error-bar lengths from an interval: none where unknown, never below zero."""
    lo = np.where(np.isfinite(lo), np.maximum(lo, 0.0), v)
    hi = np.where(np.isfinite(hi), hi, v)
    return np.vstack([np.maximum(v - lo, 0.0), np.maximum(hi - v, 0.0)])


TRADE = (("outage", "outage (% of time, switching excluded)"),
         ("pingpong", "ping-pongs per hour"),
         ("rlf", "radio link failures per hour"))


def _policy_order(axes: list[SweptAxis]) -> list[str] | None:
    return next(([str(v) for v in a.order] for a in axes if a.key == "policy"), None)


def _fmt_value(v) -> str:
    return f"{v:g}" if isinstance(v, (int, float, np.floating)) else str(v)


def _curves(d: pd.DataFrame, along: SweptAxis | None, others: list[SweptAxis],
            policy_order: list[str] | None = None):
    """Groups of runs equal in every other axis (and policy), each sorted in sweep order of
    ``along``: yields (legend label, rows)."""
    keys = ["policy"] + [a.column for a in others]
    policy_rank = {p: i for i, p in enumerate(policy_order or [])}
    for p in dict.fromkeys(d["policy"].astype(str)):
        policy_rank.setdefault(p, len(policy_rank))
    ranks = [{v: i for i, v in enumerate(a.order)} for a in others]
    groups = []
    for vals, g in d.groupby(keys, sort=False, observed=True, dropna=False):
        vals = vals if isinstance(vals, tuple) else (vals,)
        label = " · ".join([str(vals[0])] + [f"{a.short}={_fmt_value(v)}"
                                             for a, v in zip(others, vals[1:])])
        if along is not None:
            rank = {v: i for i, v in enumerate(along.order)}
            g = g.assign(_rank=g[along.column].map(rank)).sort_values("_rank", kind="stable")
        order = (policy_rank.get(str(vals[0]), 0),) + tuple(r.get(v, len(r))
                                                          for r, v in zip(ranks, vals[1:]))
        groups.append((order, label, g))
    for _, label, g in sorted(groups, key=lambda x: x[0]):    # legend in sweep order too
        yield label, g


AREA_MEAN = "_area_terminals"    # marks rows that are an area's weighted means
MEANS = ("handovers_per_hour", "outage_fraction", "ping_pongs", "radio_link_failures",
         "worst_hour_handovers", "dwell_mean_s")
# per-terminal statistics that a mean over terminals would misstate: left empty
NOT_MEANS = ("handovers_per_hour_lo", "handovers_per_hour_hi", "outage_fraction_lo",
             "outage_fraction_hi", "ping_pong_per_hour_lo", "ping_pong_per_hour_hi",
             "dwell_mean_lo_s", "dwell_mean_hi_s", "slew_p95_deg")


def area_terminals(df: pd.DataFrame) -> tuple[list[str], set[str]]:
    """The areas of a combined summary (in order) and the terminals they generated; none for a
    sweep without ``[[area]]`` tables."""
    if "area" not in df.columns:
        return [], set()
    has = df["area"].notna()
    return ([str(a) for a in dict.fromkeys(df.loc[has, "area"].astype(str))],
            set(df.loc[has, "terminal"].astype(str)))


def area_means(df: pd.DataFrame, area: str, keep: list[str]) -> pd.DataFrame:
    """One row per run and policy: the weighted means over the area's terminals of the
    quantities the sweep's figures and report show (weights: the population's, as
    ``areas.parquet`` weights its means), with the run's columns ``keep`` (its swept values;
    the same for all its rows).  Intervals and percentiles are NaN: a mean over terminals
    has no Poisson interval, and a mean of percentiles is no percentile."""
    d = df[df["area"].astype(object) == area]
    cols = list(dict.fromkeys(["run_key", "policy", "duration_h"] +
                              [c for c in keep if c in d.columns]))
    rows = []
    for _, g in d.groupby(["run_key", "policy"], sort=False, observed=True):
        w = g["weight"].to_numpy(dtype=float)
        row = {c: g[c].iloc[0] for c in cols}
        for col in MEANS:            # as areas.parquet has them: NaN terminals left out
            row[col] = weighted_mean(g[col].to_numpy(dtype=float), w)
        row.update({c: np.nan for c in NOT_MEANS})
        row["terminal"] = f"area {area}"
        row[AREA_MEAN] = len(g)
        rows.append(row)
    return pd.DataFrame(rows)


def tradeoff_figure(d: pd.DataFrame, terminal: str, axes: list[SweptAxis]):
    """One terminal: per numeric swept axis a block of four panels (handover rate against the
    value, then outage, ping-pong and failures against handover rate), or one block of points
    labelled by policy if no numeric axis varies."""
    # a seed is a replication, not a setting: its runs form separate lines, never a curve
    curve_axes = [a for a in axes if a.numeric and not a.key.endswith(".seed")] or [None]
    fig = plt.figure(figsize=(14, 8.4 * len(curve_axes)), layout="constrained")
    blocks = np.atleast_1d(fig.subfigures(len(curve_axes), 1))
    for block, along in zip(blocks, curve_axes):
        panels = block.subplots(2, 2).ravel()
        # policy is its own grouping; a terminal set is fixed by the terminal drawn here
        others = [a for a in axes if a is not along
                  and a.column not in ("policy_set", "terminal_set")]
        groups = list(_curves(d, along, others, _policy_order(axes)))
        cmap = plt.get_cmap("tab10" if len(groups) <= 10 else "tab20")
        for k, (label, g) in enumerate(groups):
            colour = cmap(k % cmap.N)
            m = _metrics(g)
            ho, ho_lo, ho_hi = m["ho"]
            x = g[along.column].to_numpy(dtype=float) if along is not None \
                else np.full(len(g), float(k))
            panels[0].errorbar(x, ho, yerr=_err(ho, ho_lo, ho_hi), color=colour, marker="o",
                               ms=4, capsize=2, lw=1.2, label=label)
            names = [_fmt_value(v) for v in g[along.column]] if along is not None \
                else [label] * len(g)
            for ax, (key, _) in zip(panels[1:], TRADE):
                y, lo, hi = m[key]
                # the handover-rate intervals are in the first panel; here only y's, faint,
                # so that the wide intervals of zero counts do not hide the points
                bars = ax.errorbar(ho, y, yerr=_err(y, lo, hi), color=colour, marker="o", ms=4,
                                   capsize=2, elinewidth=0.6, lw=1.2 if along is not None else 0,
                                   label=label)
                for part in bars.lines[1] + bars.lines[2]:
                    part.set_alpha(0.45)
                for xi, yi, name in zip(ho, y, names):
                    ax.annotate(name, (xi, yi), xytext=(4, 4), textcoords="offset points",
                                fontsize=7, color=colour)
        if along is not None:
            panels[0].set_xlabel(along.label)
            panels[0].set_title(f"Handover rate against {along.short}", fontsize=10)
            panels[0].set_xticks(sorted({float(v) for v in along.order}))
            block.suptitle(f"Swept: {along.label}; trade-off points are labelled with its "
                           "value and joined in sweep order" + (
                               "" if AREA_MEAN in d.columns else
                               " (handover-rate intervals: first panel)"), fontsize=10)
        else:
            panels[0].set_xticks(range(len(groups)), [lab for lab, _ in groups], rotation=20,
                                 ha="right", fontsize=8)
            panels[0].set_xlim(-0.5, len(groups) - 0.5)
            panels[0].set_xlabel("runs (no numeric axis varies)")
            panels[0].set_title("Handover rate per run", fontsize=10)
        panels[0].set_ylabel("handovers per hour")
        for ax, (_, ylabel) in zip(panels[1:], TRADE):
            ax.set_xlabel("handovers per hour")
            ax.set_ylabel(ylabel)
            ax.set_title(f"{ylabel.split(' (')[0].capitalize()} against handover rate",
                         fontsize=10)
        for ax in panels:
            if ax.axison:
                ax.set_ylim(bottom=0)
                ax.grid(alpha=0.3)
        panels[1].legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0),
                         title="lines: runs alike in\nevery other axis", title_fontsize=8)
    if AREA_MEAN in d.columns:
        fig.suptitle(f"{terminal}: sweep trade-offs of the weighted means over its "
                     f"{int(d[AREA_MEAN].max())} terminals (no intervals)")
    else:
        fig.suptitle(f"{terminal}: sweep trade-offs (bars: 95 % intervals from the summary)")
    return fig


def by_terminal_figure(df: pd.DataFrame, terminal_axis: SweptAxis, axes: list[SweptAxis]):
    """A terminal axis (generated sites): handovers, outage, ping-pong and failures per hour
    against the site, in sweep order, one line per set of runs alike in every other axis."""
    others = [a for a in axes if a is not terminal_axis and a.column != "policy_set"]
    sites = [str(v) for v in terminal_axis.order]
    position = {s: i for i, s in enumerate(sites)}
    fig, panels = plt.subplots(2, 2, figsize=(14, 8.4), layout="constrained")
    panels = panels.ravel()
    quantities = (("ho", "handovers per hour"),) + TRADE
    groups = list(_curves(df.assign(_site=df["terminal"].astype(str).map(position))
                          .sort_values("_site", kind="stable"), None, others,
                          _policy_order(axes)))
    cmap = plt.get_cmap("tab10" if len(groups) <= 10 else "tab20")
    for k, (label, g) in enumerate(groups):
        g = g.sort_values("_site", kind="stable")
        m = _metrics(g)
        for ax, (key, _) in zip(panels, quantities):
            y, lo, hi = m[key]
            ax.errorbar(g["_site"].to_numpy(dtype=float), y, yerr=_err(y, lo, hi),
                        color=cmap(k % cmap.N), marker="o", ms=4, capsize=2, lw=1.2, label=label)
    for ax, (_, ylabel) in zip(panels, quantities):
        ax.set_xticks(range(len(sites)), sites, rotation=30 if len(sites) > 6 else 0,
                      ha="right" if len(sites) > 6 else "center", fontsize=8)
        ax.set_xlabel("terminal (swept site, in sweep order)")
        ax.set_ylabel(ylabel)
        ax.set_title(f"{ylabel.split(' (')[0].capitalize()} per site", fontsize=10)
        ax.set_ylim(bottom=0)
        ax.grid(alpha=0.3)
    panels[1].legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0),
                     title="lines: runs alike in\nevery other axis", title_fontsize=8)
    fig.suptitle("Results per swept site (bars: 95 % intervals from the summary)")
    return fig


def worst_hour_figure(df: pd.DataFrame, terminals: list[str], policies: list[str]):
    """Worst-hour handovers (antenna switches) per policy, over the runs, one panel per
    terminal."""
    n = len(terminals)
    fig, axes = plt.subplots(1, n, figsize=(max(6.0, 1.1 * len(policies) + 2) * min(n, 4), 4.5),
                             squeeze=False, layout="constrained", sharey=True)
    for ax, term in zip(axes[0], terminals):
        d = df[df["terminal"].astype(str) == term]
        pols = [p for p in policies if (d["policy"].astype(str) == p).any()]
        data = [d[d["policy"].astype(str) == p]["worst_hour_handovers"].to_numpy() for p in pols]
        ax.boxplot(data, tick_labels=pols)
        for i, values in enumerate(data):      # every run as a point: boxes of few runs mislead
            ax.plot(np.full(values.size, i + 1.0), values, "o", ms=3, color="tab:blue", alpha=0.6,
                    label="one run" if i == 0 else None)
        ax.tick_params(axis="x", rotation=20)
        ax.set_xlabel("policy")
        ax.set_title(term)
        ax.grid(alpha=0.3, axis="y")
    axes[0][0].set_ylabel("handovers in the worst clock hour")
    axes[0][-1].legend(fontsize=8, loc="upper right")
    fig.suptitle("Worst-hour handovers (antenna switches) per policy, over the sweep's runs")
    return fig


def slug(name: str) -> str:
    """A name made safe for a file name or an HTML id."""
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name)[:80]


def check_sweep_options(out: Path, df: pd.DataFrame, terminal: str | None, policy: str | None,
                        hour: int | None) -> None:
    """A terminal or policy the sweep does not hold, or an hour (which a sweep's figures do
    not use), is an InputError naming the folder, the option and the value."""
    terms = list(dict.fromkeys(df["terminal"].astype(str)))
    pols = list(dict.fromkeys(df["policy"].astype(str)))
    if terminal is not None and terminal not in terms:
        raise InputError(str(out), "--terminal", terminal,
                         "no such terminal in this sweep (known: " + ", ".join(terms[:12])
                         + (", ..." if len(terms) > 12 else "") + ")")
    if policy is not None and policy not in pols:
        raise InputError(str(out), "--policy", policy,
                         "no such policy in this sweep (known: " + ", ".join(pols) + ")")
    if hour is not None:
        raise InputError(str(out), "--hour", hour, "a sweep's figures show whole runs; --hour "
                         "applies to a run folder (e.g. DIR/_runs/<run key> is not one: use "
                         "dwell run on its run.toml)")


def render_sweep(out_dir: str | Path, terminal: str | None = None, policy: str | None = None,
                 hour: int | None = None, finish: Callable[[Figure], bytes] = png_bytes
                 ) -> list[Rendered]:
    """Check the options, then draw every sweep figure in memory (``finish`` turns each into
    PNG bytes).  Cost: about a second per terminal figure."""
    out = Path(out_dir)
    df = combined_summary(out)
    if df.empty:
        raise InputError(str(out), None, None, "no finished runs to plot")
    check_sweep_options(out, df, terminal, policy, hour)
    axes = swept_axes(out, df)
    if policy is not None:
        df = df[df["policy"].astype(str) == policy]
    terms = list(dict.fromkeys(df["terminal"].astype(str)))
    site_axis = next((a for a in axes if a.key == "terminal"), None)
    if site_axis is not None:         # generated sites in sweep order
        rank = {str(v): i for i, v in enumerate(site_axis.order)}
        terms.sort(key=lambda t: rank.get(t, len(rank)))
    areas, in_area = area_terminals(df)
    listed = [t for t in terms if t not in in_area]
    # generated terminals are drawn one by one only when asked for: their area's figure
    # summarises them
    chosen = [terminal] if terminal is not None else listed[:MAX_TERMINALS]
    figures = []
    for area in areas[:MAX_TERMINALS] if terminal is None else []:
        d = area_means(df, area, [ax.column for ax in axes])
        figures.append(Rendered(
            f"area_tradeoff_{slug(area)}.png",      # never a terminal's tradeoff_<name>
            f"area {area}: the weighted means over its terminals of the handover rate against "
            "each swept value, and of outage, ping-pong and failures against it.",
            finish(tradeoff_figure(d, f"area {area}", axes))))
    for term in chosen:
        d = df[df["terminal"].astype(str) == term]
        figures.append(Rendered(
            f"tradeoff_{slug(term)}.png",
            f"{term}: handover rate against each swept value, and outage, ping-pong and "
            "failures against handover rate (95 % intervals).",
            finish(tradeoff_figure(d, term, axes))))
    if site_axis is not None and terminal is None:
        figures.append(Rendered("by_site.png", "Handovers, outage, ping-pong and failures per "
                                "swept site, in sweep order (95 % intervals).",
                                finish(by_terminal_figure(df, site_axis, axes))))
    pols = list(dict.fromkeys(df["policy"].astype(str)))
    if chosen:                 # per terminal: an area-only sweep has none to show one by one
        figures.append(Rendered("worst_hour_switches.png", "Worst-hour handovers per policy "
                                "over the runs, per terminal.",
                                finish(worst_hour_figure(df, chosen[:4], pols))))
    return figures


def plot_sweep(out_dir: str | Path, terminal: str | None = None, policy: str | None = None,
               hour: int | None = None) -> list[Path]:
    """``dwell plot`` of a sweep folder: figures into ``DIR/_plots`` (all drawn before the
    first is written).  Returns the paths written."""
    out = Path(out_dir)
    return write_rendered(render_sweep(out, terminal, policy, hour), out / "_plots")
