"""Figures of a run's population: heat maps of the generated terminals over latitude and
longitude, and the handover load over time (``dwell plot``, ``dwell report``).

Maps use no map data: a graticule (parallels and meridians labelled in degrees), the outline of
each area and the values.  Values are shaded over the Delaunay triangulation of the terminals'
positions (colour interpolated between terminals, triangles whose centre lies outside every
area left blank); the axes' aspect makes one degree of longitude ``cos(latitude)`` of one
degree of latitude at the map's middle latitude, so distances look alike both ways there.
Fewer than three terminals, or terminals on one line, are drawn as coloured dots instead.

Costs: a triangulation and one shaded panel per quantity, well under a second for 10,000
terminals; the load figure draws one spike per busy second.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..io.areas import Region, region_of
from .plots import Figure, MaxNLocator, plt

# (summary column, panel title, colour-bar label, scale applied to the values)
MAP_QUANTITIES = (
    ("handovers_per_hour", "Handovers per hour", "handovers / h", 1.0),
    ("outage_fraction", "Outage", "% of time", 100.0),
    ("mean_in_view", "Mean satellites in view", "satellites", 1.0),
    ("satellite_changes_per_hour", "Satellite changes (antenna switches) per hour",
     "switches / h", 1.0),
)
MAX_POLICY_PANELS = 6
GRATICULE_STEPS_DEG = (0.01, 0.02, 0.05, 0.1, 0.2, 0.25, 0.5, 1, 2, 5, 10, 15, 30, 45, 60)


@dataclass(frozen=True)
class PopulationFigure:
    name: str
    caption: str
    figure: Figure


def _graticule(ax, lat: np.ndarray, lon: np.ndarray) -> None:
    """Parallels and meridians at a round step (about 4-8 lines across the map), labelled
    N/S and E/W; the aspect matches the middle latitude."""
    lat_lo, lat_hi = float(np.min(lat)), float(np.max(lat))
    lon_lo, lon_hi = float(np.min(lon)), float(np.max(lon))
    pad = max(0.01, 0.06 * max(lat_hi - lat_lo, lon_hi - lon_lo))
    pad_lat = pad_lon = pad
    lat_lo, lat_hi = max(-90.0, lat_lo - pad_lat), min(90.0, lat_hi + pad_lat)
    lon_lo, lon_hi = lon_lo - pad_lon, lon_hi + pad_lon
    span = max(lat_hi - lat_lo, lon_hi - lon_lo)
    step = next((s for s in GRATICULE_STEPS_DEG if span / s <= 8), 90.0)
    lats = np.arange(np.ceil(lat_lo / step) * step, lat_hi + 1e-9, step)
    lons = np.arange(np.ceil(lon_lo / step) * step, lon_hi + 1e-9, step)
    ax.set_xlim(lon_lo, lon_hi)
    ax.set_ylim(lat_lo, lat_hi)
    ax.set_xticks(lons)
    ax.set_yticks(lats)
    ax.set_xticklabels([_lon_label(x) for x in lons], fontsize=8)
    ax.set_yticklabels([_lat_label(y) for y in lats], fontsize=8)
    ax.grid(True, color="0.6", lw=0.5, alpha=0.6)
    mid = np.radians(0.5 * (lat_lo + lat_hi))
    ax.set_aspect(1.0 / max(np.cos(mid), 0.05))
    ax.set_xlabel("longitude")
    ax.set_ylabel("latitude")


def _fmt(v: float) -> str:
    return f"{round(v, 6):g}" if abs(v - round(v)) > 1e-9 else f"{int(round(v))}"


def _lat_label(v: float) -> str:
    return "0°" if abs(v) < 1e-9 else f"{_fmt(abs(v))}°{'N' if v > 0 else 'S'}"


def _lon_label(v: float) -> str:
    w = (v + 180.0) % 360.0 - 180.0          # 190 is 170 W
    if abs(w) < 1e-9 or abs(abs(w) - 180.0) < 1e-9:
        return f"{_fmt(abs(w))}°"
    return f"{_fmt(abs(w))}°{'E' if w > 0 else 'W'}"


def _triangulation(lat: np.ndarray, lon: np.ndarray, regions: list[Region]):
    """Delaunay triangles of the positions (in locally equal-distance coordinates), those
    whose centre lies outside every region masked; None when the points do not span a plane."""
    from matplotlib.tri import Triangulation

    if lat.size < 3:
        return None
    scale = np.cos(np.radians(0.5 * (lat.min() + lat.max())))
    try:
        tri = Triangulation(lon * max(scale, 0.05), lat)
        tri = Triangulation(lon, lat, triangles=tri.triangles)
    except (RuntimeError, ValueError):      # fewer than 3 distinct points, or all collinear
        return None
    if not len(tri.triangles):
        return None
    c_lat = lat[tri.triangles].mean(axis=1)
    c_lon = lon[tri.triangles].mean(axis=1)
    inside = np.zeros(c_lat.size, bool)
    for r in regions:
        inside |= r.contains(c_lat, c_lon)
    tri.set_mask(~inside)
    return tri


def _panel(ax, lat, lon, values, regions, tri, title: str, unit: str, vmin, vmax) -> None:
    ok = np.isfinite(values)
    if vmin is None:
        vmin = float(np.nanmin(values)) if ok.any() else 0.0
        vmax = float(np.nanmax(values)) if ok.any() else 1.0
    if vmax <= vmin:                         # one value everywhere: a flat colour
        vmin, vmax = (0.0, 1.0) if vmin == 0.0 else sorted((0.9 * vmin, 1.1 * vmin))
    drawn = None
    if tri is not None and ok.all() and not tri.mask.all():
        drawn = ax.tripcolor(tri, values, shading="gouraud", cmap="viridis", vmin=vmin,
                             vmax=vmax)
    if drawn is None or lat.size <= 400:
        dots = ax.scatter(lon[ok], lat[ok], c=values[ok], cmap="viridis", vmin=vmin, vmax=vmax,
                          s=36 if drawn is None else 6,
                          edgecolors="k" if drawn is None else "none", linewidths=0.3)
        drawn = drawn or dots
    for r in regions:
        o_lat, o_lon = r.outline()
        ax.plot(o_lon, o_lat, color="k", lw=0.8)
    _graticule(ax, np.concatenate([lat] + [r.outline()[0] for r in regions]),
               np.concatenate([lon] + [r.outline()[1] for r in regions]))
    ax.set_title(title, fontsize=10)
    ax.figure.colorbar(drawn, ax=ax, label=unit, shrink=0.85)


def map_figure(map_df: pd.DataFrame, regions: list[Region], policy: str) -> Figure:
    """Four heat maps of the generated terminals under ``policy``: handovers per hour, outage,
    mean number in view, satellite changes (antenna switches) per hour."""
    d = map_df[map_df["policy"].astype(str) == policy]
    lat, lon = d["lat_deg"].to_numpy(dtype=float), d["lon_deg"].to_numpy(dtype=float)
    tri = _triangulation(lat, lon, regions)
    fig, axes = plt.subplots(2, 2, figsize=(12.5, 9.5), layout="constrained")
    for ax, (col, title, unit, scale) in zip(axes.flat, MAP_QUANTITIES):
        _panel(ax, lat, lon, d[col].to_numpy(dtype=float) * scale, regions, tri, title, unit,
               None, None)
    areas = ", ".join(dict.fromkeys(d["area"].astype(str)))
    fig.suptitle(f"Areas {areas}: {len(d)} terminals under {policy}")
    return fig


def policies_map_figure(map_df: pd.DataFrame, regions: list[Region], policies: list[str]
                        ) -> Figure:
    """Handovers per hour of the generated terminals, one panel per policy on one colour
    scale (at most ``MAX_POLICY_PANELS`` policies)."""
    pols = policies[:MAX_POLICY_PANELS]
    d = map_df[map_df["policy"].astype(str).isin(pols)]
    v = d["handovers_per_hour"].to_numpy(dtype=float)
    vmin = float(np.nanmin(v)) if np.isfinite(v).any() else 0.0
    vmax = float(np.nanmax(v)) if np.isfinite(v).any() else 1.0
    cols = min(3, len(pols))
    rows = int(np.ceil(len(pols) / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(5.6 * cols, 4.6 * rows), squeeze=False,
                             layout="constrained")
    tri = None
    for ax, pol in zip(axes.flat, pols):
        g = d[d["policy"].astype(str) == pol]
        lat, lon = g["lat_deg"].to_numpy(dtype=float), g["lon_deg"].to_numpy(dtype=float)
        tri = _triangulation(lat, lon, regions) if tri is None else tri
        _panel(ax, lat, lon, g["handovers_per_hour"].to_numpy(dtype=float), regions, tri,
               pol, "handovers / h", vmin, vmax)
    for ax in list(axes.flat)[len(pols):]:
        ax.set_visible(False)
    fig.suptitle("Handovers per hour of the area terminals, per policy (one colour scale)")
    return fig


def _bin_s(duration_s: float) -> int:
    """Seconds per bin of the load-over-time panel: 1 up to half an hour, else whole minutes,
    at most about 1,500 bins (common practice: no more bins than the figure has pixels)."""
    if duration_s <= 1800:
        return 1
    return 60 * max(1, math.ceil(duration_s / 1500 / 60))


def _binned(second: np.ndarray, value: np.ndarray, duration_s: float, bin_s: int):
    """Bin edges (s), the largest value and the mean per second of each bin of ``bin_s``
    seconds (seconds without a handover count as 0)."""
    n = max(1, math.ceil(duration_s / bin_s))
    idx = np.minimum((second // bin_s).astype(np.int64), n - 1)
    peak = np.zeros(n)
    np.maximum.at(peak, idx, value)
    total = np.bincount(idx, weights=value, minlength=n)
    edges = np.minimum(np.arange(n + 1) * float(bin_s), duration_s)
    return edges, peak, total / np.diff(edges)


def load_figure(load: pd.DataFrame, bursts: pd.DataFrame, peaks: pd.DataFrame, policy: str,
                duration_s: float) -> Figure:
    """Handover load under ``policy``: per second over the run, the whole population's
    handovers (weighted) and the busiest satellite's and cell's (into + out of + within);
    below, how many bursts of each size (terminals handed over into or out of one satellite or
    cell in one second) the run had."""
    d = load[load["policy"].astype(str) == policy]
    pk = peaks[peaks["policy"].astype(str) == policy]
    b = bursts[bursts["policy"].astype(str) == policy]
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(12, 8), layout="constrained",
                                 height_ratios=(1.4, 1.0))
    cells = d[d["level"].astype(str) == "cell"]
    per_s = cells.groupby("second", sort=True)["into"].sum()    # every handover enters a cell
    bin_s = _bin_s(duration_s)
    series = [("whole population (every handover)", "0.45", per_s.index.to_numpy(dtype=float),
               per_s.to_numpy(dtype=float))]
    for level, colour in (("satellite", "C0"), ("cell", "C3")):
        lp = pk[pk["level"].astype(str) == level]
        if not len(lp):
            continue
        top = lp.iloc[int(np.argmax(lp["peak_per_s"].to_numpy()))]
        g = d[(d["level"].astype(str) == level)
              & (d["element"].astype(str) == str(top["element"]))]
        series.append((f"busiest {level}: {top['element']} (peak {top['peak_per_s']:g}/s)",
                       colour, g["second"].to_numpy(dtype=float), g["total"].to_numpy(dtype=float)))
    for label, colour, sec, val in series:
        if bin_s == 1:
            a1.vlines(sec / 3600.0, 0, val, color=colour, lw=0.6, label=label)
            continue
        # a long run has more seconds than the figure has pixels: each bin shows its busiest
        # second (the peak a processor must absorb) and, thinner, its mean per second
        edges, peak, mean = _binned(sec, val, duration_s, bin_s)
        a1.stairs(peak, edges / 3600.0, color=colour, lw=1.0, label=label)
        a1.stairs(mean, edges / 3600.0, color=colour, lw=0.6, alpha=0.6)
    a1.set_xlim(0, duration_s / 3600.0)
    a1.set_ylim(bottom=0)
    a1.set_xlabel("scenario time (h)")
    if bin_s == 1:
        a1.set_ylabel("handovers in the second (weighted)")
        a1.set_title(f"Handover load per second under {policy}", fontsize=10)
    else:
        a1.set_ylabel("handovers per second (weighted)")
        a1.set_title(f"Handover load under {policy}: the busiest second of each "
                     f"{bin_s / 60:g}-minute bin (thin: the bin's mean per second)", fontsize=10)
    a1.legend(fontsize=8, loc="upper right")
    a1.grid(alpha=0.3)
    shown = False
    for (level, direction), style in {("satellite", "into"): ("C0", "-"),
                                      ("satellite", "out_of"): ("C0", "--"),
                                      ("cell", "into"): ("C3", "-"),
                                      ("cell", "out_of"): ("C3", "--")}.items():
        g = b[(b["level"].astype(str) == level) & (b["direction"].astype(str) == direction)]
        if not len(g):
            continue
        a2.plot(g["burst_terminals"], g["bursts"], marker="o", ms=3, color=style[0],
                ls=style[1], label=f"{level}, {direction.replace('_', ' ')}")
        shown = True
    a2.set_yscale("log")
    a2.xaxis.set_major_locator(MaxNLocator(integer=True))
    a2.set_xlabel("burst size: terminals handed over into / out of one element in one second")
    a2.set_ylabel("bursts (element-seconds)")
    a2.set_title("Distribution of burst sizes (group handovers show as sizes above 1)",
                 fontsize=10)
    if shown:
        a2.legend(fontsize=8)
    a2.grid(alpha=0.3, which="both")
    return fig


def population_figures(run_dir, policy: str, areas: list[dict], duration_s: float
                       ) -> list[PopulationFigure]:
    """The population figures of a run folder that has their tables: ``map.png`` (the chosen
    policy's four heat maps) and ``map_policies.png`` (handovers per hour per policy) when the
    run has generated terminals, ``load.png`` when it has handovers.  Folders written before
    these tables existed get none.  Reads map, load, load_peaks and load_bursts."""
    from pathlib import Path

    run_dir = Path(run_dir)
    out: list[PopulationFigure] = []
    map_file = run_dir / "map.parquet"
    if map_file.is_file():
        mp = pd.read_parquet(map_file)
        if len(mp):
            regions = [region_of(a) for a in areas]
            pols = list(dict.fromkeys(mp["policy"].astype(str)))
            pol = policy if policy in pols else pols[0]
            out.append(PopulationFigure(
                "map.png", f"Heat maps of the area terminals under {pol}: handovers per hour, "
                "outage, mean satellites in view and satellite changes (antenna switches) "
                "per hour.", map_figure(mp, regions, pol)))
            if len(pols) > 1:
                out.append(PopulationFigure(
                    "map_policies.png", "Handovers per hour of the area terminals, one map "
                    "per policy on one colour scale.", policies_map_figure(mp, regions, pols)))
    files = [run_dir / f"{t}.parquet" for t in ("load", "load_bursts", "load_peaks")]
    if all(f.is_file() for f in files):
        load, bursts, peaks = (pd.read_parquet(f) for f in files)
        if len(load):
            pols = list(dict.fromkeys(load["policy"].astype(str)))
            pol = policy if policy in pols else pols[0]
            out.append(PopulationFigure(
                "load.png", f"Handover load under {pol}: per second, the whole population and "
                "the busiest satellite and cell; the distribution of burst sizes.",
                load_figure(load, bursts, peaks, pol, duration_s)))
    return out
