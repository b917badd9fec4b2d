"""Simulated against analytic: each closed form of :mod:`dwell.analysis.analytic` next to the run's own
value and its 95 % interval, only where the formula's assumptions hold for the run (otherwise
the row says why not, instead of printing a misleading number).

Intervals of the simulated values: percentile bootstrap over clock hours for time averages
(in view, none in view, mean pass duration), exact Poisson intervals for rates (passes,
handovers), a percentile bootstrap over street positions for the canyon's blocking angle.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from ..io.config import Scenario, load_scenario
from ..orbits.frames import MEAN_EARTH_RADIUS_KM
from . import analytic as an
from .summary import hour_edges, per_hour, ratio_interval

SEED = 20270510  # fixed: the same run folder always gives the same intervals


def _hourly(a: np.ndarray, b: np.ndarray, w: np.ndarray, duration_s: float
            ) -> tuple[np.ndarray, np.ndarray]:
    """Per clock hour: integral of a step function (value w on [a, b)), and the hour lengths."""
    edges = hour_edges(duration_s)
    return per_hour(a, b, edges, w), np.diff(edges)


def _ratio_ci(num: np.ndarray, den: np.ndarray) -> tuple[float, float]:
    """Interval of a time average; a point when the hours cannot vary it."""
    if num.size < 3 or np.allclose(num / np.maximum(den, 1e-9), (num / np.maximum(den, 1e-9))[0]):
        v = float(num.sum() / den.sum())
        return v, v
    return ratio_interval(num, den, SEED, n_resamples=1999)


def _row(terminal, policy, quantity, sim, lo, hi, ana, note="") -> dict:
    rel = (sim - ana) / ana if (ana is not None and np.isfinite(ana) and ana != 0) else math.nan
    inside = "-" if ana is None or not np.isfinite(lo) else ("yes" if lo <= ana <= hi else "no")
    return {"terminal": terminal, "policy": policy, "quantity": quantity, "simulated": sim,
            "sim_lo": lo, "sim_hi": hi, "analytic": math.nan if ana is None else ana,
            "rel_diff": rel, "inside_interval": inside, "note": note}


def _na(terminal, policy, quantity, reason) -> dict:
    return {"terminal": terminal, "policy": policy, "quantity": quantity, "simulated": math.nan,
            "sim_lo": math.nan, "sim_hi": math.nan, "analytic": math.nan, "rel_diff": math.nan,
            "inside_interval": "-", "note": "not applicable: " + reason}


def _mean_radius_km(scen: Scenario, shell: str) -> float:
    """Mean SGP4 radius of a shell's satellites over one orbit (J2 keeps it a few km off the
    nominal altitude)."""
    from sgp4.api import SatrecArray
    sats = [s.satrec for s in scen.constellation.satellites if s.shell == shell]
    n = min(s.satrec.no_kozai for s in scen.constellation.satellites if s.shell == shell) / 60
    t = np.linspace(0.0, 2 * math.pi / n, 97)
    jd, fr = scen.epoch.julian(t)
    _, r, _ = SatrecArray(sats).sgp4(jd, fr)
    return float(np.nanmean(np.linalg.norm(r, axis=-1)))


def _shells(scen: Scenario) -> list[dict]:
    """Constellation tables with their satellite counts."""
    out = []
    for c in scen.constellations:
        n = sum(1 for s in scen.constellation.satellites if s.shell == c["name"])
        out.append({**c, "count": n})
    return out


def compare_run(run_dir: str | Path) -> pd.DataFrame:
    run_dir = Path(run_dir)
    scen = load_scenario(run_dir / "run.toml")
    T = float(scen.scenario["duration_s"])
    visible = pd.read_parquet(run_dir / "visible.parquet")
    passes = pd.read_parquet(run_dir / "passes.parquet")
    summary = pd.read_parquet(run_dir / "summary.parquet")
    shells = _shells(scen)
    kinds = {c["kind"] for c in shells}
    rows = []
    for k, term in enumerate(scen.terminals):
        name = term["name"]
        site = scen.sites[k]
        floor = float(term["min_elevation_deg"])
        v = visible[visible["terminal"] == name]
        a = (v["start_utc"] - pd.Timestamp(scen.epoch.start)).dt.total_seconds().to_numpy()
        b = (v["end_utc"] - pd.Timestamp(scen.epoch.start)).dt.total_seconds().to_numpy()
        n_in = v["in_view"].to_numpy(dtype=float)
        sim_n = float(np.sum((b - a) * n_in) / T)
        num, den = _hourly(a, b, n_in, T)
        lo_n, hi_n = _ratio_ci(num, den)
        none_num, _ = _hourly(a, b, (n_in == 0).astype(float), T)
        sim_0 = float(none_num.sum() / T)
        lo_0, hi_0 = _ratio_ci(none_num, den)
        moving = term["track"] is not None or term["drive"] is not None
        blocked = site.has_obstruction
        why = None
        if blocked:
            why = "the terminal has obstructions (mask, canyon or line of sight)"
        elif moving:
            why = "the terminal moves"
        psi = [an.cap_half_angle_rad(floor, MEAN_EARTH_RADIUS_KM + c["altitude_km"]) for c in shells
               if "altitude_km" in c]
        if why:
            rows.append(_na(name, "-", "mean in view", why))
            rows.append(_na(name, "-", "fraction of time none in view", why))
        elif kinds == {"isotropic"}:
            ana_n = float(sum(an.isotropic_mean_in_view(c["count"], p) for c, p in zip(shells, psi)))
            ana_0 = float(np.prod([an.isotropic_p_none(c["count"], p) for c, p in zip(shells, psi)]))
            note = "binomial point process on the shell, exact for isotropic orbits (spherical Earth)"
            rows.append(_row(name, "-", "mean in view", sim_n, lo_n, hi_n, ana_n, note))
            rows.append(_row(name, "-", "fraction of time none in view", sim_0, lo_0, hi_0, ana_0,
                             note))
        elif kinds <= {"walker-delta", "walker-star"}:
            # the formula's sphere matched to the run: the site's geocentric latitude and
            # radius, each shell's mean propagated radius
            r_site = site.motion.ecef(np.zeros(1))[0][0]
            site_r = float(np.linalg.norm(r_site))
            lat_c = math.degrees(math.asin(r_site[2] / site_r))
            ana_n = float(sum(an.walker_mean_in_view(
                c["count"], c["inclination_deg"], lat_c,
                float(an.cap_half_angle_rad(floor, _mean_radius_km(scen, c["name"]), site_r)))
                for c in shells))
            note = ("latitude density of ideal circular inclined orbits over the cap; assumes "
                    "nodes averaged by Earth rotation (runs of a day or more); SGP4's J2-perturbed "
                    "orbits differ from it by about 1-2 %, which the interval (sampling only) "
                    "does not cover")
            if not scen.scenario["earth_rotation"]:
                rows.append(_na(name, "-", "mean in view", "the Earth does not rotate, so a Walker "
                                "shell's longitudes are not averaged"))
            else:
                rows.append(_row(name, "-", "mean in view", sim_n, lo_n, hi_n, ana_n, note))
            rows.append(_na(name, "-", "fraction of time none in view",
                            "Walker satellites are not independent (no binomial law)"))
        else:
            rows.append(_na(name, "-", "mean in view", f"no closed form for {sorted(kinds)}"))
            rows.append(_na(name, "-", "fraction of time none in view",
                            f"no closed form for {sorted(kinds)}"))
        # pass rate and mean duration: isotropic, one altitude, non-rotating Earth or polar site
        polar = abs(term["lat_deg"]) > 89.9
        p = passes[passes["terminal"] == name]
        if why:
            rows.append(_na(name, "-", "passes per hour", why))
            rows.append(_na(name, "-", "mean pass duration s", why))
        elif kinds != {"isotropic"} or len({c["altitude_km"] for c in shells}) != 1:
            rows.append(_na(name, "-", "passes per hour", "needs one isotropic shell"))
            rows.append(_na(name, "-", "mean pass duration s", "needs one isotropic shell"))
        elif scen.scenario["earth_rotation"] and not polar:
            reason = "Earth rotation moves the terminal (set earth_rotation = false or use a pole)"
            rows.append(_na(name, "-", "passes per hour", reason))
            rows.append(_na(name, "-", "mean pass duration s", reason))
        else:
            c = shells[0]
            omega = float(np.mean([s.mean_motion_rad_s for s in scen.constellation.satellites]))
            starts = p[~p["cut_at_start"]]
            count = len(starts)
            lo, hi = an.poisson_rate_interval(count, T / 3600.0)
            ana_rate = float(an.isotropic_pass_rate_per_s(c["count"], psi[0], omega)) * 3600.0
            note = "boundary flux of random great circles through the cap (non-rotating Earth)"
            rows.append(_row(name, "-", "passes per hour", count / (T / 3600.0), float(lo),
                             float(hi), ana_rate, note))
            full = p[~p["cut_at_start"] & ~p["cut_at_end"]]["duration_s"].to_numpy()
            if full.size >= 3:
                bs = stats.bootstrap((full,), np.mean, n_resamples=1999, method="percentile",
                                     random_state=np.random.default_rng(SEED))
                ci = bs.confidence_interval
                rows.append(_row(name, "-", "mean pass duration s", float(full.mean()),
                                 float(ci.low), float(ci.high),
                                 float(an.isotropic_mean_pass_duration_s(psi[0], omega)), note))
        # nearest-satellite association against the Poisson-Voronoi crossing rate
        for pol in scen.policies:
            if pol["rule"] != "shortest-range":
                continue
            label = pol["name"]
            if pol["hysteresis_km"] > 0 or pol["min_dwell_s"] > 0:
                rows.append(_na(name, label, "handovers per hour", "hysteresis or guard present"))
                continue
            if why or len({c.get("altitude_km") for c in shells}) != 1 or \
                    not kinds <= {"isotropic", "walker-delta", "walker-star", "random-planes"}:
                rows.append(_na(name, label, "handovers per hour",
                                why or "needs one generated shell"))
                continue
            srow = summary[(summary["terminal"] == name) & (summary["policy"] == label)].iloc[0]
            omega = float(np.mean([s.mean_motion_rad_s for s in scen.constellation.satellites]))
            # local density of the shell around the terminal: analytic mean in view over cap area
            cap_sr = 2 * math.pi * (1 - math.cos(psi[0]))
            n_eff = (sim_n / cap_sr) * 4 * math.pi
            ana = float(an.nearest_satellite_handover_rate_per_s(n_eff, 1.0, omega)) * 3600.0
            n_ho = int(srow["handovers"])
            lo, hi = an.poisson_rate_interval(n_ho, T / 3600.0)
            rows.append(_row(name, label, "handovers per hour", n_ho / (T / 3600.0), float(lo),
                             float(hi), ana, "LOCAL APPROXIMATION: planar Poisson-Voronoi crossing "
                             "rate at the local density (Lin et al. 2013), rigid motion assumed"))
        # the street canyon's steepest-building law
        if term["canyon"] is not None:
            rows.append(_canyon_row(name, site, term))
    return pd.DataFrame(rows)


def _canyon_row(name: str, site, term: dict) -> dict:
    from ..obstruction import CanyonObstruction
    can = next(ob for ob in site.obstructions if isinstance(ob, CanyonObstruction)).canyon
    p = term["canyon"]
    lo_m, hi_m = can.along_range_m
    half = can.margin_m
    xs = np.arange(lo_m - half * 0.9, hi_m + half * 0.9, 100.0)   # spaced beyond a few buildings
    samples = np.concatenate([can.half_line_cut_tan(side, xs) for side in (0, 1)])
    sim = float(np.median(samples))
    bs = stats.bootstrap((samples,), np.median, n_resamples=1999, method="percentile",
                         random_state=np.random.default_rng(SEED))
    excess = an.mean_excess_height_m(p["height_law"], p["height_mean_m"], p["antenna_height_m"],
                                     sigma=p["height_sigma"], shape=p["height_shape"],
                                     values=p["height_values_m"], weights=p["height_weights"])
    ana = an.frechet_tan_median(p["buildings_per_km"] / 1000.0, excess)
    return _row(name, "-", "median tan(blocking angle) along the street", sim,
                float(bs.confidence_interval.low), float(bs.confidence_interval.high), ana,
                "Frechet law of the steepest Poisson-placed building (extreme-value theory)")


def format_comparison(df: pd.DataFrame) -> str:
    lines = []
    head = f"{'terminal':<14} {'policy':<18} {'quantity':<44} {'simulated (95% interval)':<30} " \
           f"{'analytic':>10} {'rel diff':>9}  inside"
    lines.append(head)
    lines.append("-" * len(head))
    for _, r in df.iterrows():
        if r["note"].startswith("not applicable"):
            lines.append(f"{r['terminal']:<14} {r['policy']:<18} {r['quantity']:<44} {r['note']}")
            continue
        sim = f"{r['simulated']:.4g} ({r['sim_lo']:.4g}..{r['sim_hi']:.4g})"
        lines.append(f"{r['terminal']:<14} {r['policy']:<18} {r['quantity']:<44} {sim:<30} "
                     f"{r['analytic']:>10.4g} {r['rel_diff']:>+9.2%}  {r['inside_interval']}")
    notes = sorted({r["note"] for _, r in df.iterrows() if not r["note"].startswith("not applicable")})
    if notes:
        lines.append("")
        lines += [f"* {n}" for n in notes]
    return "\n".join(lines) + "\n"
