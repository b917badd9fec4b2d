"""Plots (matplotlib, PNG): what users would rather look at than tables.

Every figure has units on its axes, a legend where several series share it, and a title that
says what it shows.  Writes are atomic.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from ..io.atomic import atomic_path  # noqa: E402


def _save(fig, path: Path) -> None:
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=120, bbox_inches="tight", format="png")
    plt.close(fig)


def mask_plot(az_deg: np.ndarray, el_deg: np.ndarray, floor_deg: float, title: str,
              path: Path) -> None:
    """A mask as a polar sky view (zenith at the centre) and as elevation against azimuth."""
    fig = plt.figure(figsize=(11, 4.5))
    ax = fig.add_subplot(1, 2, 1, projection="polar")
    ax.set_theta_zero_location("N")
    ax.set_theta_direction(-1)
    th = np.radians(np.append(az_deg, az_deg[0]))
    r = 90.0 - np.append(el_deg, el_deg[0])
    ax.fill_between(th, r, 90.0, color="0.55", alpha=0.7, label="blocked")
    ax.plot(th, np.full(th.shape, 90.0 - floor_deg), "r--", lw=1, label=f"floor {floor_deg:g} deg")
    ax.set_rmax(90)
    ax.set_rticks([0, 30, 60, 90])
    ax.set_yticklabels(["90", "60", "30", "0"])
    ax.set_title("sky view (elevation rings, deg)", pad=18)
    ax.legend(loc="lower left", bbox_to_anchor=(-0.15, -0.15), fontsize=8)
    ax2 = fig.add_subplot(1, 2, 2)
    ax2.fill_between(az_deg, 0, el_deg, color="0.55", alpha=0.7, step="mid", label="mask")
    ax2.axhline(floor_deg, color="r", ls="--", lw=1, label="elevation floor")
    ax2.set_xlim(0, 360)
    ax2.set_ylim(0, 90)
    ax2.set_xticks(range(0, 361, 45))
    ax2.set_xlabel("azimuth (deg, from north through east)")
    ax2.set_ylabel("elevation (deg)")
    ax2.legend(fontsize=8)
    ax2.grid(alpha=0.3)
    fig.suptitle(title, y=1.04)
    _save(fig, path)


def _terminals(df) -> list[str]:
    return list(dict.fromkeys(df["terminal"].astype(str)))


def _policies(df) -> list[str]:
    return list(dict.fromkeys(df["policy"].astype(str)))


def ccdf_plot(ccdf, path: Path) -> None:
    """Dwell-time complementary CDF per policy, one panel per terminal."""
    terms = _terminals(ccdf)
    fig, axes = plt.subplots(1, len(terms), figsize=(5.2 * len(terms), 4.2), squeeze=False,
                             sharey=True)
    for ax, term in zip(axes[0], terms):
        d = ccdf[ccdf["terminal"].astype(str) == term]
        for pol in _policies(d):
            g = d[d["policy"].astype(str) == pol]
            ax.step(g["dwell_s"], np.maximum(g["ccdf"], 1e-4), where="post", label=pol)
        ax.set_yscale("log")
        ax.set_ylim(1e-3, 1.05)
        ax.set_xlabel("dwell (s)")
        ax.set_title(term)
        ax.grid(alpha=0.3, which="both")
    axes[0][0].set_ylabel("P(dwell > x)")
    axes[0][-1].legend(fontsize=8, loc="upper right")
    fig.suptitle("Dwell time per link: complementary CDF (completed links)", y=1.02)
    _save(fig, path)


def rates_plot(summary, path: Path) -> None:
    """Handovers per hour (95 % Poisson interval) and outage fraction per policy and terminal."""
    terms, pols = _terminals(summary), _policies(summary)
    x = np.arange(len(terms))
    w = 0.8 / max(1, len(pols))
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(13, 4.5))
    for i, pol in enumerate(pols):
        g = summary[summary["policy"].astype(str) == pol].set_index("terminal").reindex(terms)
        rate = g["handovers_per_hour"].to_numpy(dtype=float)
        err = np.vstack([rate - g["handovers_per_hour_lo"], g["handovers_per_hour_hi"] - rate])
        a1.bar(x + i * w, rate, w, yerr=err, capsize=2, label=pol)
        a2.bar(x + i * w, 100 * g["outage_fraction"].to_numpy(dtype=float), w, label=pol)
    for ax, lab in ((a1, "handovers per hour"), (a2, "outage (% of time, switching excluded)")):
        ax.set_xticks(x + 0.4 - w / 2)
        ax.set_xticklabels(terms)
        ax.set_ylabel(lab)
        ax.grid(alpha=0.3, axis="y")
    a2.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    a1.set_title("Handover rate (error bars: 95 % Poisson interval)")
    a2.set_title("Outage fraction")
    _save(fig, path)


def visible_plot(visible, analytic_mean: dict[str, float], start, path: Path) -> None:
    """Satellites in view over time per terminal, with the time average and the analytic mean."""
    terms = _terminals(visible)
    fig, axes = plt.subplots(len(terms), 1, figsize=(12, 2.6 * len(terms)), squeeze=False,
                             sharex=True)
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
        ax.set_ylabel("satellites")
        ax.set_title(term)
        ax.legend(fontsize=8, loc="upper right", ncol=3)
        ax.grid(alpha=0.3)
    axes[-1, 0].set_xlabel("hours since scenario start")
    fig.suptitle("Satellites in view (above floor and clear of obstructions)", y=1.01)
    _save(fig, path)


def timeline_plot(visible, links, handovers, terminal: str, hour: int, start, path: Path) -> None:
    """One hour of one terminal: satellites in view, and for each policy a lane of its links
    (alternating shades, satellite names on the longer ones) with handover instants marked."""
    t0 = hour * 3600.0

    def minutes(col):
        return ((col - start).dt.total_seconds().to_numpy() - t0) / 60.0

    lk = links[links["terminal"].astype(str) == terminal]
    pols = _policies(lk)
    fig, (a0, ax) = plt.subplots(2, 1, figsize=(13, 1.8 + 0.55 * len(pols)), sharex=True,
                                 gridspec_kw={"height_ratios": [1, max(2, len(pols) * 0.55)]})
    v = visible[visible["terminal"].astype(str) == terminal]
    vs, ve = minutes(v["start_utc"]), minutes(v["end_utc"])
    k = (ve > 0) & (vs < 60)
    a0.step(np.clip(np.append(vs[k], ve[k][-1:]), 0, 60), np.append(v["in_view"][k], v["in_view"][k][-1:]),
            where="post", lw=0.8)
    a0.set_ylabel("in view")
    a0.grid(alpha=0.3)
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    h = handovers[handovers["terminal"].astype(str) == terminal]
    for i, pol in enumerate(pols):
        g = lk[lk["policy"].astype(str) == pol]
        ls, le = minutes(g["start_utc"]), minutes(g["end_utc"])
        keep = (le > 0) & (ls < 60)
        base = colors[i % len(colors)]
        for j, (s_name, a, b) in enumerate(zip(g["satellite"].astype(str)[keep], ls[keep], le[keep])):
            a, b = max(a, 0.0), min(b, 60.0)
            ax.barh(i, b - a, left=a, height=0.6, color=base, alpha=0.9 if j % 2 else 0.55,
                    edgecolor="none")
            if b - a > 2.5:
                ax.text(0.5 * (a + b), i, s_name, ha="center", va="center", fontsize=6)
        ht = minutes(h[h["policy"].astype(str) == pol]["time_utc"])
        ht = ht[(ht >= 0) & (ht <= 60)]
        ax.plot(ht, np.full(ht.shape, i + 0.38), "|", color="k", ms=5)
    ax.set_yticks(range(len(pols)))
    ax.set_yticklabels(pols)
    ax.invert_yaxis()
    ax.set_xlim(0, 60)
    ax.set_xlabel(f"minutes after the start of hour {hour}")
    ax.grid(alpha=0.3, axis="x")
    a0.set_title(f"{terminal}, hour {hour}: serving satellite per policy (bars: links, ticks: handovers)")
    _save(fig, path)


def sky_plot(tracks: dict, mask_az: np.ndarray | None, mask_el: np.ndarray | None,
             floor_deg: float, serving: dict, title: str, path: Path) -> None:
    """Sky view of pass tracks, the mask and the serving segments of one policy.

    ``tracks`` maps satellite -> (az_deg, el_deg) arrays; ``serving`` the same for the
    segments while that satellite served."""
    fig = plt.figure(figsize=(7.5, 7.5))
    ax = fig.add_subplot(projection="polar")
    ax.set_theta_zero_location("N")
    ax.set_theta_direction(-1)
    if mask_az is not None:
        th = np.radians(np.append(mask_az, mask_az[0]))
        r = 90.0 - np.append(mask_el, mask_el[0])
        ax.fill_between(th, r, 90.0, color="0.55", alpha=0.6, label="obstruction mask")
    th = np.linspace(0, 2 * np.pi, 361)
    ax.plot(th, np.full(th.shape, 90.0 - floor_deg), "r--", lw=1, label="elevation floor")
    for k, (az, el) in enumerate(tracks.values()):
        ax.plot(np.radians(az), 90.0 - el, color="0.4", lw=0.6, label="passes" if k == 0 else None)
    for k, (az, el) in enumerate(serving.values()):
        ax.plot(np.radians(az), 90.0 - el, color="tab:blue", lw=2.2,
                label="serving" if k == 0 else None)
    ax.set_rmax(90)
    ax.set_rticks([0, 30, 60, 90])
    ax.set_yticklabels(["90", "60", "30", "0"])
    ax.legend(fontsize=8, loc="lower left", bbox_to_anchor=(-0.1, -0.1))
    ax.set_title(title, pad=18)
    _save(fig, path)
