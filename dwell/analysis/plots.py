"""Figures of one run (matplotlib): what users would rather look at than tables.

Each ``*_figure`` function draws one figure from result tables and returns it (nothing is
written); :func:`png_bytes` renders a figure to PNG in memory and :func:`save_png` writes one
atomically.  Every figure has units on its axes, a legend where several series share it, and
a title that says what it shows.  Costs are a few hundred milliseconds per figure (rendering).
"""

from __future__ import annotations

import io
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402

from ..io.atomic import atomic_path  # noqa: E402

DPI = 110


def png_bytes(fig: Figure) -> bytes:
    """The figure as PNG bytes (the figure is closed)."""
    buf = io.BytesIO()
    fig.savefig(buf, dpi=DPI, bbox_inches="tight", format="png")
    plt.close(fig)
    return buf.getvalue()


def save_png(fig: Figure, path: Path) -> None:
    """Write the figure as a PNG file atomically (the figure is closed)."""
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=DPI, bbox_inches="tight", format="png")
    plt.close(fig)


_save = save_png    # the older name, used by callers outside this module


def terminals_of(df) -> list[str]:
    """Terminal names in order of first appearance."""
    return list(dict.fromkeys(df["terminal"].astype(str)))


def policies_of(df) -> list[str]:
    """Policy names in order of first appearance."""
    return list(dict.fromkeys(df["policy"].astype(str)))


def policy_colours(policies: list[str]) -> dict[str, str]:
    """One colour per policy, the same in every figure of a run."""
    cycle = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    return {p: cycle[i % len(cycle)] for i, p in enumerate(policies)}


def _polar_sky(ax) -> None:
    """North up, azimuth clockwise, zenith at the centre; rings labelled with elevation."""
    ax.set_theta_zero_location("N")
    ax.set_theta_direction(-1)
    ax.set_rmax(90)
    ax.set_rticks([0, 30, 60, 90])
    ax.set_yticklabels(["90°", "60°", "30°", "0°"], fontsize=8)
    for label in ax.get_yticklabels():      # readable over the tracks
        label.set_bbox({"facecolor": "white", "alpha": 0.75, "edgecolor": "none", "pad": 0.5})
    ax.set_rlabel_position(112.5)           # between the 90 and 135 deg spokes, clear of data


def mask_plot(az_deg: np.ndarray, el_deg: np.ndarray, floor_deg: float, title: str,
              path: Path) -> None:
    """:func:`mask_figure` written to ``path`` (PNG, atomically)."""
    save_png(mask_figure(az_deg, el_deg, floor_deg, title), path)


def mask_figure(az_deg: np.ndarray, el_deg: np.ndarray, floor_deg: float, title: str) -> Figure:
    """A mask as a polar sky view (zenith at the centre) and as elevation against azimuth."""
    fig = plt.figure(figsize=(11, 5.2), layout="constrained")
    ax = fig.add_subplot(1, 2, 1, projection="polar")
    th = np.radians(np.append(az_deg, az_deg[0]))
    r = 90.0 - np.append(el_deg, el_deg[0])
    ax.fill_between(th, r, 90.0, color="0.55", alpha=0.7, label="blocked")
    ax.plot(th, np.full(th.shape, 90.0 - floor_deg), "r--", lw=1,
            label=f"elevation floor {floor_deg:g}°")
    _polar_sky(ax)
    ax.set_title("Sky view: zenith at the centre, rings = elevation,\n"
                 "azimuth clockwise from north", fontsize=10, pad=14)
    ax.legend(loc="upper left", bbox_to_anchor=(-0.25, 0.02), fontsize=8)
    ax2 = fig.add_subplot(1, 2, 2)
    ax2.fill_between(az_deg, 0, el_deg, color="0.55", alpha=0.7, step="mid", label="blocked")
    ax2.axhline(floor_deg, color="r", ls="--", lw=1, label=f"elevation floor {floor_deg:g}°")
    ax2.set_xlim(0, 360)
    ax2.set_ylim(0, 90)
    ax2.set_xticks(range(0, 361, 45))
    ax2.set_xlabel("azimuth (deg, from north through east)")
    ax2.set_ylabel("mask elevation (deg)")
    ax2.set_title("Mask elevation against azimuth", fontsize=10)
    ax2.legend(fontsize=8, loc="upper left")
    ax2.grid(alpha=0.3)
    fig.suptitle(title, fontsize=12)
    return fig


def ccdf_figure(ccdf) -> Figure:
    """Dwell-time complementary CDF per policy, one panel per terminal."""
    terms = terminals_of(ccdf)
    colours = policy_colours(policies_of(ccdf))
    fig, axes = plt.subplots(1, len(terms), figsize=(5.2 * len(terms) + 1.5, 4.2), squeeze=False,
                             sharey=True, layout="constrained")
    for ax, term in zip(axes[0], terms):
        d = ccdf[ccdf["terminal"].astype(str) == term]
        for pol in policies_of(d):
            g = d[d["policy"].astype(str) == pol]
            ax.step(g["dwell_s"], np.maximum(g["ccdf"], 1e-4), where="post", label=pol,
                    color=colours[pol])
        ax.set_yscale("log")
        ax.set_ylim(1e-3, 1.05)
        ax.set_xlabel("dwell x (s)")
        ax.set_title(term)
        ax.grid(alpha=0.3, which="both")
    axes[0][0].set_ylabel("P(dwell > x)")
    axes[0][-1].legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.02, 1.0), title="policy")
    fig.suptitle("Dwell time per link: complementary CDF (completed links)")
    return fig


def _interval_err(value: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Error-bar lengths (below, above) from an interval; no bar where it is unknown, and
    never below zero."""
    lo = np.where(np.isfinite(lo), np.maximum(lo, 0.0), value)
    hi = np.where(np.isfinite(hi), hi, value)
    return np.vstack([np.maximum(value - lo, 0.0), np.maximum(hi - value, 0.0)])


def rates_figure(summary) -> Figure:
    """Handovers per hour and outage (% of time) per policy and terminal, 95 % intervals."""
    terms, pols = terminals_of(summary), policies_of(summary)
    colours = policy_colours(pols)
    x = np.arange(len(terms))
    w = 0.8 / max(1, len(pols))
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(max(9.0, 2.2 * len(terms) * 2 + 2), 4.5),
                                 layout="constrained")
    for i, pol in enumerate(pols):
        g = summary[summary["policy"].astype(str) == pol].set_index("terminal").reindex(terms)
        rate = g["handovers_per_hour"].to_numpy(dtype=float)
        a1.bar(x + i * w, rate, w, color=colours[pol], label=pol,
               yerr=_interval_err(rate, g["handovers_per_hour_lo"].to_numpy(dtype=float),
                                  g["handovers_per_hour_hi"].to_numpy(dtype=float)), capsize=2)
        out = 100 * g["outage_fraction"].to_numpy(dtype=float)
        a2.bar(x + i * w, out, w, color=colours[pol], label=pol,
               yerr=_interval_err(out, 100 * g["outage_fraction_lo"].to_numpy(dtype=float),
                                  100 * g["outage_fraction_hi"].to_numpy(dtype=float)), capsize=2)
    for ax, lab in ((a1, "handovers per hour"), (a2, "outage (% of time, switching excluded)")):
        ax.set_xticks(x + 0.4 - w / 2)
        ax.set_xticklabels(terms, rotation=20 if len(terms) > 4 else 0)
        ax.set_xlabel("terminal")
        ax.set_ylabel(lab)
        ax.set_ylim(bottom=0)
        ax.grid(alpha=0.3, axis="y")
    a2.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), title="policy")
    a1.set_title("Handover rate (bars: 95 % Poisson interval)")
    a2.set_title("Outage fraction (bars: 95 % hour-bootstrap interval)")
    return fig


def visible_figure(visible, analytic_mean: dict[str, float], start) -> Figure:
    """Satellites in view over time per terminal, with the time average and the analytic mean."""
    terms = terminals_of(visible)
    fig, axes = plt.subplots(len(terms), 1, figsize=(12, 2.2 + 2.0 * len(terms)), squeeze=False,
                             sharex=True, layout="constrained")
    for ax, term in zip(axes[:, 0], terms):
        v = visible[visible["terminal"].astype(str) == term]
        h = (v["start_utc"] - start).dt.total_seconds().to_numpy() / 3600.0
        h_end = (v["end_utc"] - start).dt.total_seconds().to_numpy() / 3600.0
        n = v["in_view"].to_numpy()
        ax.step(np.append(h, h_end[-1:]), np.append(n, n[-1:]), where="post", lw=0.6,
                label="in view")
        mean = float(np.sum((h_end - h) * n) / np.sum(h_end - h))
        ax.axhline(mean, color="k", lw=1.2, label=f"time average {mean:.2f}")
        if term in analytic_mean:
            ax.axhline(analytic_mean[term], color="r", ls="--", lw=1.2,
                       label=f"analytic mean {analytic_mean[term]:.2f}")
        ax.set_ylabel("satellites in view")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_title(term, fontsize=10)
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
        ax.grid(alpha=0.3)
    axes[-1, 0].set_xlabel("hours since scenario start")
    fig.suptitle("Satellites in view (above the elevation floor and clear of obstructions)")
    return fig


def timeline_figure(visible, links, handovers, terminal: str, hour: int, start) -> Figure:
    """One hour of one terminal: satellites in view, and for each policy a lane of its links
    (the shade changes with the serving satellite, whose name is written on the longer stays)
    with its handovers marked: satellite changes tall and black, beam or cell changes within
    one satellite short and grey, failed attempts red.  Cost: one bar call per lane."""
    t0 = hour * 3600.0

    def minutes(col):
        return ((col - start).dt.total_seconds().to_numpy() - t0) / 60.0

    lk = links[links["terminal"].astype(str) == terminal]
    pols = policies_of(lk)
    colours = policy_colours(policies_of(links))
    fig, (a0, ax) = plt.subplots(2, 1, figsize=(13, 2.4 + 0.55 * len(pols)), sharex=True,
                                 layout="constrained",
                                 gridspec_kw={"height_ratios": [1, max(2, len(pols) * 0.55)]})
    v = visible[visible["terminal"].astype(str) == terminal]
    vs, ve = minutes(v["start_utc"]), minutes(v["end_utc"])
    k = (ve > 0) & (vs < 60)
    n = v["in_view"].to_numpy()[k]
    a0.step(np.clip(np.append(vs[k], ve[k][-1:]), 0, 60), np.append(n, n[-1:]), where="post",
            lw=0.8)
    a0.set_ylabel("in view")
    a0.yaxis.set_major_locator(MaxNLocator(integer=True))
    a0.grid(alpha=0.3)
    h = handovers[handovers["terminal"].astype(str) == terminal]
    marks = {"satellite change": dict(color="k", ms=7), "beam or cell change": dict(color="0.55",
                                                                                    ms=4),
             "failed handover": dict(color="tab:red", ms=7)}
    shown: set[str] = set()
    for i, pol in enumerate(pols):
        g = lk[lk["policy"].astype(str) == pol]
        ls, le = minutes(g["start_utc"]), minutes(g["end_utc"])
        keep = (le > 0) & (ls < 60)
        sats = g["satellite"].astype(str).to_numpy()[keep]
        a, b = np.maximum(ls[keep], 0.0), np.minimum(le[keep], 60.0)
        # one stay = consecutive links on one satellite (beam changes keep it)
        stay = np.cumsum(np.r_[True, sats[1:] != sats[:-1]]) - 1 if sats.size else sats
        for odd, alpha in ((0, 0.55), (1, 0.9)):
            m = stay % 2 == odd
            if m.any():
                ax.barh(np.full(int(m.sum()), i), (b - a)[m], left=a[m], height=0.6,
                        color=colours[pol], alpha=alpha, edgecolor="none")
        for s_id in np.unique(stay).tolist():
            m = stay == s_id
            lo, hi = float(a[m].min()), float(b[m].max())
            if hi - lo > 3.5:            # room for the name
                ax.text(0.5 * (lo + hi), i, sats[m][0], ha="center", va="center", fontsize=6)
        hp = h[h["policy"].astype(str) == pol]
        ht = minutes(hp["time_utc"])
        inside = (ht >= 0) & (ht <= 60)
        failed = (hp["outcome"].astype(str).to_numpy() != "success") if "outcome" in hp \
            else np.zeros(len(hp), bool)
        inter = hp["scope"].astype(str).to_numpy() == "inter-satellite" if "scope" in hp \
            else np.ones(len(hp), bool)
        for label, m in (("beam or cell change", ~inter & ~failed),
                         ("satellite change", inter & ~failed), ("failed handover", failed)):
            m = m & inside
            if m.any():
                ax.plot(ht[m], np.full(int(m.sum()), i + 0.38), "|", **marks[label],
                        label=None if label in shown else label)
                shown.add(label)
    ax.set_yticks(range(len(pols)))
    ax.set_yticklabels(pols)
    ax.set_ylabel("policy")
    ax.invert_yaxis()
    ax.set_xlim(0, 60)
    ax.set_xlabel(f"minutes after the start of hour {hour}")
    ax.grid(alpha=0.3, axis="x")
    if shown:
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    a0.set_title(f"{terminal}, hour {hour}: satellites in view (top) and serving satellite per "
                 "policy (bars: links, a new shade per satellite; ticks: handovers)")
    return fig


def sky_figure(tracks: dict, mask_az: np.ndarray | None, mask_el: np.ndarray | None,
               floor_deg: float, serving: dict, title: str) -> Figure:
    """Sky view of pass tracks, the mask and the serving segments of one policy.

    ``tracks`` maps satellite -> (az_deg, el_deg) arrays; ``serving`` the same for the
    segments while that satellite served."""
    fig = plt.figure(figsize=(7.5, 7.8), layout="constrained")
    ax = fig.add_subplot(projection="polar")
    if mask_az is not None:
        th = np.radians(np.append(mask_az, mask_az[0]))
        r = 90.0 - np.append(mask_el, mask_el[0])
        ax.fill_between(th, r, 90.0, color="0.55", alpha=0.6, label="obstruction mask")
    th = np.linspace(0, 2 * np.pi, 361)
    ax.plot(th, np.full(th.shape, 90.0 - floor_deg), "r--", lw=1,
            label=f"elevation floor {floor_deg:g}°")
    for k, (az, el) in enumerate(tracks.values()):
        ax.plot(np.radians(az), 90.0 - el, color="0.4", lw=0.6, label="passes" if k == 0 else None)
    for k, (az, el) in enumerate(serving.values()):
        ax.plot(np.radians(az), 90.0 - el, color="tab:blue", lw=2.2,
                label="serving" if k == 0 else None)
    _polar_sky(ax)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(-0.12, 0.02))
    ax.set_title(title + "\nzenith at the centre, rings = elevation, azimuth clockwise from north",
                 pad=14, fontsize=10)
    return fig


# ---- the older names: draw and write in one call (kept for callers of dwell.plots) ----------

def ccdf_plot(ccdf, path: Path) -> None:
    save_png(ccdf_figure(ccdf), path)


def rates_plot(summary, path: Path) -> None:
    save_png(rates_figure(summary), path)


def visible_plot(visible, analytic_mean: dict[str, float], start, path: Path) -> None:
    save_png(visible_figure(visible, analytic_mean, start), path)


def timeline_plot(visible, links, handovers, terminal: str, hour: int, start, path: Path) -> None:
    save_png(timeline_figure(visible, links, handovers, terminal, hour, start), path)


def sky_plot(tracks: dict, mask_az, mask_el, floor_deg: float, serving: dict, title: str,
             path: Path) -> None:
    save_png(sky_figure(tracks, mask_az, mask_el, floor_deg, serving, title), path)
