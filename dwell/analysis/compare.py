"""Simulated against analytic: each closed form next to the run's own value and its 95 %
interval, only where the formula's assumptions hold for the run (otherwise the row says why
not, instead of printing a misleading number).

``comparison.parquet`` (``dwell compare OUTDIR``; ``DIR/_comparison.parquet`` for a sweep) has
one row per terminal x policy x quantity:

==================  ====================================================================
column              meaning
==================  ====================================================================
terminal            terminal name
policy              policy name, or ``-`` for quantities of the terminal's geometry
quantity            what is compared (e.g. ``passes per hour``, ``P(SINR > 5 dB)``)
simulated           the run's value (sweep: the mean over the pooled runs)
sim_lo, sim_hi      its 95 % interval (NaN when there is none)
interval            what that interval covers: time sampling of this one run (hour
                    bootstrap, Poisson count, bootstrap over passes or street positions),
                    or the spread across seeds (Student-t over the runs' values)
analytic            the formula's value (NaN when not applicable)
rel_diff            (simulated - analytic) / analytic
inside_interval     whether the analytic value lies in [sim_lo, sim_hi]; null when either
                    is missing (boolean)
applicable          whether the formula's assumptions hold (boolean)
source              the formula and where it comes from (book, paper, or the derivation
                    in ``docs/``)
geometry            the Earth model and radii the formula used (site distance from the
                    Earth's centre, geocentric latitude, the shell's propagated radius)
runs                how many runs the row pools (1 for a single run)
group               sweep only: the parameters the pooled runs share (empty for one run)
note                the formula's assumptions or approximations, or ``not applicable:
                    <reason>``
==================  ====================================================================

Intervals of one run cover its time sampling only: they are conditional on the one draw of
the constellation the run made.  Percentile bootstrap over clock hours for time averages (in
view, none in view, count spread, SINR coverage), exact Poisson (Garwood) intervals for
counts of passes and handovers, a bootstrap over passes for the mean pass duration and over
street positions for the canyon's blocking angle.  ``dwell compare SWEEPDIR`` pools runs that
differ only in seeds and gives a Student-t interval over the runs' values, which covers the
variation between draws (see :mod:`dwell.analysis.ensemble`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from ..io.config import Scenario, load_scenario
from ..io.errors import InputError
from ..orbits.frames import EARTH_RATE_RAD_S
from . import analytic as an
from . import nearest_rate, shells as sh, sinr_coverage, until_lost
from .summary import hour_edges, per_hour, ratio_interval

SEED = 20270510  # fixed: the same run folder always gives the same intervals
SINR_THRESHOLDS_DB = (-5.0, 0.0, 5.0, 10.0)

IV_HOURS = "hour bootstrap (time sampling of this run only)"
IV_POISSON = "exact Poisson on the count (time sampling of this run only)"
IV_PASSES = "bootstrap over passes (time sampling of this run only)"
IV_STREET = "bootstrap over street positions (this run's canyon only)"

SRC_CAP = "cap area fraction of a binomial point process (Archimedes' hat-box theorem)"
SRC_LATITUDE = ("latitude density of circular inclined orbits over the cap "
                "(docs/inclined-shells.md)")
SRC_FLUX = "inward flux through the visibility cap, Earth rotation included (docs/inclined-shells.md)"
SRC_LITTLE = "Little's law: mean in view / pass rate (docs/inclined-shells.md)"
SRC_BINOMIAL = "binomial in-view count of independent uniform satellites"
SRC_POISSON = "Poisson law of the in-view count (docs/inclined-shells.md)"
SRC_NEAREST = ("Rice's formula for nearest-satellite changes of a binomial point process "
               "(docs/nearest-satellite-rate.md)")
SRC_VORONOI = ("planar Poisson-Voronoi crossing rate: Lin, Ganti, Fleming and Andrews, IEEE "
               "Trans. Wireless Commun. 12(4), 2013")
SRC_UNTIL = ("renewal over the nearest satellite's remaining visibility "
             "(docs/inclined-shells.md)")
SRC_SINR = ("conditional Laplace transform / characteristic function of the interference, "
            "binomial point process (Haenggi 2012; Chiu, Stoyan, Kendall and Mecke 2013; "
            "docs/sinr-coverage.md)")
SRC_FRECHET = "Frechet law of the steepest Poisson-placed building (Resnick 1987)"

COLUMNS = ("terminal", "policy", "quantity", "simulated", "sim_lo", "sim_hi", "interval",
           "analytic", "rel_diff", "inside_interval", "applicable", "source", "geometry", "runs",
           "group", "note")


# ---- rows -------------------------------------------------------------------------------------

def _row(terminal, policy, quantity, sim, lo, hi, ana, interval, source, geometry="",
         note="") -> dict:
    ok = ana is not None and np.isfinite(ana)
    rel = (sim - ana) / ana if ok and ana != 0 else math.nan
    inside = (bool(lo <= ana <= hi) if ok and np.isfinite(lo) and np.isfinite(hi) else None)
    return {"terminal": terminal, "policy": policy, "quantity": quantity, "simulated": sim,
            "sim_lo": lo, "sim_hi": hi, "interval": interval,
            "analytic": float(ana) if ok else math.nan, "rel_diff": rel,
            "inside_interval": inside, "applicable": True, "source": source,
            "geometry": geometry, "runs": 1, "group": "", "note": note}


def _na(terminal, policy, quantity, reason, source="") -> dict:
    return {"terminal": terminal, "policy": policy, "quantity": quantity, "simulated": math.nan,
            "sim_lo": math.nan, "sim_hi": math.nan, "interval": "", "analytic": math.nan,
            "rel_diff": math.nan, "inside_interval": None, "applicable": False,
            "source": source, "geometry": "", "runs": 1, "group": "",
            "note": "not applicable: " + reason}


def frame(rows: list[dict]) -> pd.DataFrame:
    """The rows as a comparison table with the documented column types."""
    df = pd.DataFrame(rows, columns=list(COLUMNS))
    df["inside_interval"] = df["inside_interval"].astype("boolean")
    df["applicable"] = df["applicable"].astype(bool)
    df["runs"] = df["runs"].astype(np.int64)
    return df


# ---- the run's tables ---------------------------------------------------------------------------

@dataclass
class RunTables:
    scen: Scenario
    duration_s: float
    visible: pd.DataFrame
    passes: pd.DataFrame
    summary: pd.DataFrame
    sinr_ccdf: pd.DataFrame | None


def _task_folder(run_dir: Path) -> Path | None:
    """For a run inside a sweep (``DIR/_runs/<key>``): its task folder ``DIR/_tasks/<task>``,
    from the task key in the combined summary file ``DIR/summary-<key>.parquet``."""
    if run_dir.parent.name != "_runs":
        return None
    summary = run_dir.parent.parent / f"summary-{run_dir.name}.parquet"
    if not summary.is_file():
        return None
    keys = pd.read_parquet(summary, columns=["task_key"])["task_key"].astype(str).unique()
    if keys.size != 1:
        return None
    return run_dir.parent.parent / "_tasks" / keys[0]


def read_run(run_dir: str | Path) -> RunTables:
    """The tables compare needs; visible and passes come from the task folder for a run
    inside a sweep.  A missing table is an :class:`InputError` naming the folder."""
    run_dir = Path(run_dir)
    scen = load_scenario(run_dir / "run.toml")
    task = _task_folder(run_dir)

    def find(name: str, required: bool = True) -> Path | None:
        for folder in (run_dir, task):
            if folder is not None and (folder / f"{name}.parquet").is_file():
                return folder / f"{name}.parquet"
        if required:
            raise InputError(str(run_dir), None, None,
                             f"no {name}.parquet here" + (f" or in {task}" if task else ""))
        return None

    sinr_path = find("sinr_ccdf", required=False)
    return RunTables(scen, float(scen.scenario["duration_s"]),
                     pd.read_parquet(find("visible")), pd.read_parquet(find("passes")),
                     pd.read_parquet(find("summary")),
                     pd.read_parquet(sinr_path) if sinr_path is not None else None)


# ---- geometry the formulas use ----------------------------------------------------------------

def _mean_radius_km(scen: Scenario, shell: str) -> float:
    """Mean SGP4 radius of a shell's satellites over one orbit (J2 keeps it a few km off the
    nominal altitude).  The same for every terminal: computed once per scenario and shell
    (an area's thousands of terminals would otherwise propagate the shell each)."""
    from sgp4.api import SatrecArray
    cache = scen.__dict__.setdefault("_mean_radius_km", {})
    if shell not in cache:
        sats = [s.satrec for s in scen.constellation.satellites if s.shell == shell]
        n = min(s.satrec.no_kozai for s in scen.constellation.satellites if s.shell == shell) / 60
        t = np.linspace(0.0, 2 * math.pi / n, 97)
        jd, fr = scen.epoch.julian(t)
        _, r, _ = SatrecArray(sats).sgp4(jd, fr)
        cache[shell] = float(np.nanmean(np.linalg.norm(r, axis=-1)))
    return cache[shell]


@dataclass
class Geometry:
    """A terminal's geometry as the simulation has it, in the formulas' terms."""

    site: sh.Site
    shells: list[sh.Shell]
    kinds: list[str]
    text: str


def _geometry(scen: Scenario, k: int) -> Geometry:
    site = scen.sites[k]
    r_site = np.asarray(site.motion.ecef(np.zeros(1))[0][0], dtype=float)
    site_r = float(np.linalg.norm(r_site))
    lat_c = math.degrees(math.asin(r_site[2] / site_r))
    earth = scen.scenario.get("earth", "wgs84")
    rate = EARTH_RATE_RAD_S if scen.scenario["earth_rotation"] else 0.0
    shells, kinds, radii = [], [], []
    for c in scen.constellations:
        sats = [s for s in scen.constellation.satellites if s.shell == c["name"]]
        if not sats or c["kind"] not in ("isotropic", "walker-delta", "walker-star",
                                          "random-planes"):
            shells.append(None)
            kinds.append(c["kind"])
            continue
        radius = _mean_radius_km(scen, c["name"])
        omega = float(np.mean([s.mean_motion_rad_s for s in sats]))
        incl = c.get("inclination_deg")
        if c["kind"] == "isotropic" or (c["kind"] == "random-planes" and incl is None):
            incl = None
        shells.append(sh.Shell(len(sats), radius, omega, None if incl is None else float(incl)))
        kinds.append(c["kind"])
        radii.append(f"{c['name']} {radius:.1f} km")
    model = ("sphere of 6371 km" if earth == "sphere" else "WGS-84 ellipsoid")
    text = (f"{model}: site {site_r:.1f} km from the centre at geocentric latitude "
            f"{lat_c:.3f} deg; orbit radius (mean SGP4) {', '.join(radii) or '-'}; Earth "
            + ("rotating" if rate else "frozen"))
    return Geometry(sh.Site(lat_c, site_r, float(scen.terminals[k]["min_elevation_deg"]), rate),
                    shells, kinds, text)


# ---- simulated statistics -----------------------------------------------------------------------

def _hourly(a: np.ndarray, b: np.ndarray, w: np.ndarray, duration_s: float
            ) -> tuple[np.ndarray, np.ndarray]:
    """Per clock hour: integral of a step function (value w on [a, b)), and the hour lengths."""
    edges = hour_edges(duration_s)
    return per_hour(a, b, edges, w), np.diff(edges)


def _ratio_ci(num: np.ndarray, den: np.ndarray) -> tuple[float, float]:
    """Interval of a time average; a point when every hour has the same value, unknown (NaN)
    when the run has fewer than 3 clock hours to resample, the last one possibly partial (a
    run of 2 h or less: a point would claim a certainty the run cannot show, and mark the
    analytic value outside it)."""
    if num.size < 3:
        return math.nan, math.nan
    if np.allclose(num / np.maximum(den, 1e-9), (num / np.maximum(den, 1e-9))[0]):
        v = float(num.sum() / den.sum())
        return v, v
    return ratio_interval(num, den, SEED, n_resamples=1999)


def _sd_ci(s1: np.ndarray, s2: np.ndarray, den: np.ndarray) -> tuple[float, float]:
    """Hour-bootstrap interval of the time-weighted standard deviation
    ``sqrt(sum s2 / sum den - (sum s1 / sum den)^2)``."""
    def sd(a, b, c, axis=-1):
        m = np.sum(a, axis=axis) / np.sum(c, axis=axis)
        return np.sqrt(np.maximum(np.sum(b, axis=axis) / np.sum(c, axis=axis) - m * m, 0.0))
    if s1.size < 3:                 # too few hours to resample: unknown, as in _ratio_ci
        return math.nan, math.nan
    res = stats.bootstrap((s1, s2, den), sd, paired=True, vectorized=True, n_resamples=1999,
                          method="percentile", random_state=np.random.default_rng(SEED + 2))
    return float(res.confidence_interval.low), float(res.confidence_interval.high)


@dataclass
class InView:
    """The terminal's in-view process: mean, fraction with none, spread; per-hour sums."""

    mean: float
    none: float
    sd: float
    mean_ci: tuple[float, float]
    none_ci: tuple[float, float]
    sd_ci: tuple[float, float]


def _in_view(tables: RunTables, name: str) -> InView:
    scen, T = tables.scen, tables.duration_s
    v = tables.visible[tables.visible["terminal"] == name]
    start = pd.Timestamp(scen.epoch.start)
    a = (v["start_utc"] - start).dt.total_seconds().to_numpy()
    b = (v["end_utc"] - start).dt.total_seconds().to_numpy()
    n_in = v["in_view"].to_numpy(dtype=float)
    num, den = _hourly(a, b, n_in, T)
    none_num, _ = _hourly(a, b, (n_in == 0).astype(float), T)
    sq_num, _ = _hourly(a, b, n_in * n_in, T)
    mean = float(np.sum((b - a) * n_in) / T)
    sd = math.sqrt(max(float(np.sum((b - a) * n_in * n_in) / T) - mean * mean, 0.0))
    return InView(mean, float(none_num.sum() / T), sd, _ratio_ci(num, den),
                  _ratio_ci(none_num, den), _sd_ci(num, sq_num, den))


# ---- the comparison of one run --------------------------------------------------------------

def compare_run(run_dir: str | Path) -> pd.DataFrame:
    """Every comparison row of one run folder (see the module docstring for the columns).

    Cost: dominated by rebuilding the constellation from ``run.toml`` and, where they apply,
    the until-lost (tens of milliseconds) and SINR (about a second) formulas."""
    tables = read_run(run_dir)
    scen = tables.scen
    rows: list[dict] = []
    for k in range(len(scen.terminals)):
        rows += _terminal_rows(tables, k)
    return frame(rows)


def _obstacle_reason(scen: Scenario, k: int) -> str | None:
    term, site = scen.terminals[k], scen.sites[k]
    if site.has_obstruction:
        return "the terminal has obstructions (mask, canyon or line of sight)"
    if term["track"] is not None or term["drive"] is not None:
        return "the terminal moves"
    return None


def _terminal_rows(tables: RunTables, k: int) -> list[dict]:
    scen = tables.scen
    name = scen.terminals[k]["name"]
    rows: list[dict] = []
    why = _obstacle_reason(scen, k)
    geo_quantities = ("mean in view", "fraction of time none in view",
                      "in-view count standard deviation", "passes per hour",
                      "mean pass duration s")
    if why:
        rows += [_na(name, "-", q, why) for q in geo_quantities]
        rows.append(_na(name, "-", "handovers per hour", why))
        if scen.terminals[k]["canyon"] is not None:
            rows.append(_canyon_row(name, scen.sites[k], scen.terminals[k]))
        return rows
    geo = _geometry(scen, k)
    iv = _in_view(tables, name)
    rows += _in_view_rows(name, geo, iv)
    rows += _pass_rows(tables, name, geo)
    for pol in scen.policies:
        rows += _handover_rows(tables, name, geo, iv, pol)
    rows += _sinr_rows(tables, name, geo)
    return rows


def _supported(geo: Geometry) -> str | None:
    """Why the shells have no formulas, or None."""
    missing = [kind for kind, s in zip(geo.kinds, geo.shells) if s is None]
    if missing:
        return f"no closed form for {sorted(set(missing))} constellations"
    return None


def _in_view_rows(name: str, geo: Geometry, iv: InView) -> list[dict]:
    why = _supported(geo)
    quantities = ("mean in view", "fraction of time none in view",
                  "in-view count standard deviation")
    if why:
        return [_na(name, "-", q, why) for q in quantities]
    rotating = geo.site.earth_rate_rad_s > 0
    walker = [kind for kind in geo.kinds if kind.startswith("walker")]
    if walker and not rotating:
        reason = ("the Earth does not rotate, so a Walker shell's longitudes relative to the "
                  "terminal are not averaged")
        return [_na(name, "-", q, reason) for q in quantities]
    all_iso = all(s.isotropic for s in geo.shells)
    independent = all(kind == "isotropic" for kind in geo.kinds)
    ana_n = sh.shells_mean_in_view(geo.shells, geo.site)
    src_n = SRC_CAP if all_iso else SRC_LATITUDE
    note_n = ("exact for isotropic orbits on the formula's sphere" if all_iso else
              "ideal circular orbits, nodes averaged over the run (a day or more for a Walker "
              "shell); SGP4's J2 orbits differ by about 1-2 %, which the interval (time "
              "sampling only) does not cover")
    rows = [_row(name, "-", "mean in view", iv.mean, *iv.mean_ci, ana_n, IV_HOURS, src_n,
                 geo.text, note_n)]
    if independent:
        law_src, law_note = SRC_BINOMIAL, "exact for independent isotropic satellites"
    elif any(kind == "random-planes" for kind in geo.kinds) and all_iso:
        reason = "random-planes satellites share planes (not independent, no binomial law)"
        return rows + [_na(name, "-", q, reason) for q in quantities[1:]]
    else:
        law_src = SRC_POISSON
        law_note = ("POISSON APPROXIMATION: a Walker shell's satellites sit on a lattice, so "
                    "its count varies far less than a Poisson count")
    pmf = sh.in_view_pmf(geo.shells, geo.site, k_max=2)
    rows.append(_row(name, "-", "fraction of time none in view", iv.none, *iv.none_ci,
                     float(pmf[0]), IV_HOURS, law_src, geo.text, law_note))
    rows.append(_row(name, "-", "in-view count standard deviation", iv.sd, *iv.sd_ci,
                     sh.in_view_sd(geo.shells, geo.site), IV_HOURS, law_src, geo.text,
                     law_note))
    return rows


def _pass_rows(tables: RunTables, name: str, geo: Geometry) -> list[dict]:
    T = tables.duration_s
    why = _supported(geo)
    if not why and any(kind.startswith("walker") for kind in geo.kinds) \
            and geo.site.earth_rate_rad_s == 0:
        why = "the Earth does not rotate, so a Walker shell's nodes are not averaged"
    if why:
        return [_na(name, "-", "passes per hour", why), _na(name, "-", "mean pass duration s", why)]
    p = tables.passes[tables.passes["terminal"] == name]
    starts = p[~p["cut_at_start"]]
    count = len(starts)
    lo, hi = an.poisson_rate_interval(count, T / 3600.0)
    rate = sh.shells_pass_rate_per_s(geo.shells, geo.site) * 3600.0
    note = ("ideal circular orbits, nodes uniform relative to the terminal; a pass cut by the "
            "run's start is not counted")
    rows = [_row(name, "-", "passes per hour", count / (T / 3600.0), float(lo), float(hi), rate,
                 IV_POISSON, SRC_FLUX, geo.text, note)]
    full = p[~p["cut_at_start"] & ~p["cut_at_end"]]["duration_s"].to_numpy(dtype=float)
    ana_d = sh.shells_mean_pass_duration_s(geo.shells, geo.site)
    if full.size >= 3:
        bs = stats.bootstrap((full,), np.mean, n_resamples=1999, method="percentile",
                             random_state=np.random.default_rng(SEED))
        ci = bs.confidence_interval
        rows.append(_row(name, "-", "mean pass duration s", float(full.mean()), float(ci.low),
                         float(ci.high), ana_d, IV_PASSES, SRC_LITTLE, geo.text,
                         "complete passes only (neither cut by the run's start nor its end)"))
    else:
        rows.append(_na(name, "-", "mean pass duration s", "fewer than 3 complete passes"))
    return rows


def _summary_row(tables: RunTables, name: str, policy: str) -> pd.Series:
    s = tables.summary
    return s[(s["terminal"].astype(str) == name) & (s["policy"].astype(str) == policy)].iloc[0]


def _nearest_rule(pol: dict) -> str | None:
    """Why a policy is not plain nearest-satellite association, or None."""
    rule = pol["rule"]
    if rule == "highest-elevation":
        margin = pol.get("hysteresis_deg", 0.0)
    elif rule == "shortest-range":
        margin = pol.get("hysteresis_km", 0.0)
    else:
        return f"rule {rule} is not nearest-satellite association"
    if margin > 0 or pol.get("min_dwell_s", 0.0) > 0:
        return "hysteresis or minimum dwell present"
    return None


def _count_interval(tables: RunTables, name: str, label: str) -> tuple[float, float, float]:
    """Handovers per hour of one terminal x policy and its exact Poisson interval."""
    n_ho = int(_summary_row(tables, name, label)["handovers"])
    lo, hi = an.poisson_rate_interval(n_ho, tables.duration_s / 3600.0)
    return n_ho / (tables.duration_s / 3600.0), float(lo), float(hi)


def _handover_rows(tables: RunTables, name: str, geo: Geometry, iv: InView, pol: dict
                   ) -> list[dict]:
    label = pol["name"]
    q = "handovers per hour"
    srow = _summary_row(tables, name, label)
    weak = float(srow.get("outage_weak_signal_fraction", 0.0) or 0.0)
    if pol["rule"] == "until-lost":
        return [_until_lost_row(tables, name, geo, iv, pol, weak)]
    why = _nearest_rule(pol)
    if why:
        return [_na(name, label, q, why)]
    if weak > 0:
        return [_na(name, label, q, "weak-signal outages (SNR below q_out) change the link "
                                    "sequence")]
    sim, lo, hi = _count_interval(tables, name, label)
    rows = []
    one = len(geo.shells) == 1 and geo.shells[0] is not None
    if one and geo.kinds[0] == "isotropic":
        s = geo.shells[0]
        psi0 = geo.site.psi0(s)
        v_term = geo.site.earth_rate_rad_s * math.cos(math.radians(geo.site.lat_deg))
        ana = nearest_rate.isotropic_nearest_handover_rate_per_s(s.n_sat, s.omega_rad_s, psi0,
                                                                v_term) * 3600.0
        rows.append(_row(name, label, q, sim, lo, hi, ana, IV_POISSON, SRC_NEAREST, geo.text,
                         "exact for the model: changes of the nearest satellite with both above "
                         "the floor (highest elevation = nearest on one radius); the simulated "
                         "count is successful handovers, so a change lost to a radio link "
                         "failure and re-establishment counts in the formula, not the run"))
    else:
        rows.append(_na(name, label, q, "the exact form needs one isotropic shell "
                                        "(independent satellites)"))
    if one:
        s = geo.shells[0]
        psi0 = geo.site.psi0(s)
        cap_sr = 2 * math.pi * (1 - math.cos(psi0))
        n_eff = (iv.mean / cap_sr) * 4 * math.pi      # local density of the shell
        ana_pv = float(an.nearest_satellite_handover_rate_per_s(n_eff, 1.0, s.omega_rad_s)) * 3600
        rows.append(_row(name, label, "handovers per hour, planar limit", sim, lo, hi, ana_pv,
                         IV_POISSON, SRC_VORONOI, geo.text,
                         "LARGE-N PLANAR LIMIT at the local density (LOCAL APPROXIMATION): counts "
                         "every change, also below the floor"))
    return rows


def _until_lost_row(tables: RunTables, name: str, geo: Geometry, iv: InView, pol: dict,
                    weak: float) -> dict:
    label, q = pol["name"], "handovers per hour"
    if pol.get("then", "elevation") not in ("elevation", "range"):
        return _na(name, label, q, f"until-lost then = {pol.get('then')}: no formula")
    if len(geo.shells) != 1 or geo.shells[0] is None or geo.kinds[0] == "random-planes":
        return _na(name, label, q, "needs one isotropic or Walker shell")
    if geo.kinds[0].startswith("walker") and geo.site.earth_rate_rad_s == 0:
        return _na(name, label, q, "the Earth does not rotate (a Walker shell's nodes are not "
                                   "averaged)")
    if iv.none > 0:
        return _na(name, label, q, f"coverage is not continuous (none in view "
                                   f"{iv.none:.2%} of the time)")
    if weak > 0:
        return _na(name, label, q, "weak-signal outages (SNR below q_out) change the link "
                                   "sequence")
    s = geo.shells[0]
    independent = geo.kinds[0] == "isotropic"
    ana = until_lost.until_lost_handover_rate_per_s(s, geo.site, independent) * 3600.0
    sim, lo, hi = _count_interval(tables, name, label)
    note = ("RENEWAL APPROXIMATION (the other satellites as a fresh snapshot at each handover: "
            "rate 0.3-3 % high for independent satellites)"
            + ("" if independent else "; POISSON APPROXIMATION of the nearest satellite's law "
                                       "(a Walker shell is a lattice)"))
    return _row(name, label, q, sim, lo, hi, ana, IV_POISSON, SRC_UNTIL, geo.text, note)


# ---- SINR coverage ---------------------------------------------------------------------------

def _beams_table(c: dict) -> dict:
    beams = c.get("beams")
    return beams if isinstance(beams, dict) else {}


def _sinr_reason(scen: Scenario, geo: Geometry) -> str | None:
    link = scen.link
    if not link.get("interference", False):
        return "[link] interference is off (SNR only)"
    if len(scen.constellations) != 1 or geo.kinds[0] != "isotropic":
        return "needs one isotropic shell"
    beams = _beams_table(scen.constellations[0])
    if beams.get("layout", "single") != "single":
        return f"beam layout {beams.get('layout')!r} (the formula has one beam per satellite)"
    if int(beams.get("reuse", 1)) != 1:
        return f"frequency reuse {beams.get('reuse')} (the formula has reuse 1)"
    if link.get("sat_beam_pointing", "nadir") != "nadir":
        return "beams point at the terminal (the formula's beams are nadir-pointed)"
    if float(link.get("shadowing_std_db", 0.0)) > 0 or float(link.get("measurement_noise_db",
                                                                     0.0)) > 0:
        return "shadowing or measurement noise is on"
    return None


def _sinr_rows(tables: RunTables, name: str, geo: Geometry) -> list[dict]:
    scen = tables.scen
    why = _sinr_reason(scen, geo)
    if why and why.startswith("[link] interference is off"):
        return [_na(name, "-", "P(SINR > T dB)", why)]
    rows = []
    for pol in scen.policies:
        label = pol["name"]
        reason = why or _nearest_rule(pol)
        srow = _summary_row(tables, name, label)
        if reason is None and float(srow.get("outage_weak_signal_fraction", 0.0) or 0.0) > 0:
            reason = "weak-signal outages remove instants from the served set"
        if reason is None and tables.sinr_ccdf is None:
            reason = "the run folder has no sinr_ccdf.parquet"
        if reason:
            rows.append(_na(name, label, "P(SINR > T dB)", reason))
            continue
        c = tables.sinr_ccdf
        c = c[(c["terminal"].astype(str) == name) & (c["policy"].astype(str) == label)]
        s = geo.shells[0]
        psi0 = geo.site.psi0(s)
        load = float(_beams_table(scen.constellations[0]).get("load", 1.0))
        snr = sinr_coverage.snr_of_central_angle(scen.link, geo.site.radius_km,
                                                 s.orbit_radius_km)
        ana = sinr_coverage.isotropic_sinr_ccdf(np.array(SINR_THRESHOLDS_DB), s.n_sat, psi0, snr,
                                                load, "none", given_in_view=True)
        for t_db, a in zip(SINR_THRESHOLDS_DB, ana):
            q = f"P(SINR > {t_db:g} dB)"
            at = c[np.isclose(c["sinr_db"].to_numpy(dtype=float), t_db)]
            rows_h = at["rows"].to_numpy(dtype=float)
            if rows_h.sum() <= 0:
                rows.append(_na(name, label, q, f"sinr_ccdf.parquet has no served instants at "
                                                f"{t_db:g} dB"))
                continue
            num = at["ccdf"].to_numpy(dtype=float) * rows_h
            lo, hi = _ratio_ci(num, rows_h)
            rows.append(_row(name, label, q, float(num.sum() / rows_h.sum()), lo, hi, float(a),
                             IV_HOURS, SRC_SINR, geo.text,
                             f"given a satellite in view; nadir beams, reuse 1, load {load:g}, "
                             "no fading, interference from every other satellite in view"))
    return rows


# ---- the street canyon ------------------------------------------------------------------------

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
                IV_STREET, SRC_FRECHET, "",
                "buildings at Poisson positions with independent heights (extreme-value theory)")


# ---- output -----------------------------------------------------------------------------------

def write_comparison(df: pd.DataFrame, path: str | Path, scen: Scenario | None = None) -> None:
    """Write the table as Parquet (atomically, with the run's provenance); ``inside_interval``
    stays a nullable boolean."""
    import pyarrow as pa

    from ..io.tables import provenance, to_arrow, write_table
    plain = df.drop(columns=["inside_interval"])
    table = to_arrow(plain, None, provenance(scen) if scen is not None else None)
    inside = pa.array([None if v is pd.NA or v is None else bool(v)
                       for v in df["inside_interval"].tolist()], type=pa.bool_())
    table = table.add_column(list(df.columns).index("inside_interval"), "inside_interval", inside)
    write_table(table, path)


def _comparison_line(r: pd.Series, refs: dict) -> str:
    """One row of the text table (its reference numbered in ``refs``)."""
    if not r["applicable"]:
        return f"{r['terminal']:<14} {r['policy']:<18} {r['quantity']:<44} {r['note']}"
    ref = refs.setdefault((r["source"], r["note"], r["interval"]), len(refs) + 1)
    known = np.isfinite(r["sim_lo"]) and np.isfinite(r["sim_hi"])
    sim = f"{_fmt(r['simulated'])} " + (f"({_fmt(r['sim_lo'])}..{_fmt(r['sim_hi'])})"
                                        if known else "(no interval)")
    inside = r["inside_interval"]
    mark = "-" if inside is pd.NA or inside is None else ("yes" if inside else "no")
    rel = f"{r['rel_diff']:>+9.2%}" if np.isfinite(r["rel_diff"]) else f"{'-':>9}"
    return (f"{r['terminal']:<14} {r['policy']:<18} {r['quantity']:<44} {sim:<30} "
            f"{_fmt(r['analytic']):>10} {rel}  {mark:<6}  [{ref}]")


def area_bands(rows: pd.DataFrame, places: pd.DataFrame | None) -> pd.DataFrame:
    """Generated terminals' comparison rows by area, policy, quantity and 1-degree latitude
    band: the band's mean simulated and analytic values (arithmetic means over its
    terminals), their relative difference, and how many of the band's intervals hold the
    analytic value (``inside``, "k/n" of those judged, "-" if none).  Quantities that apply to
    none of an area's terminals give one row with the note (``band`` empty).  ``places`` is
    the map table (terminal, area, lat_deg); rows of other terminals are left out."""
    cols = ["area", "band", "terminals", "policy", "quantity", "simulated", "analytic",
            "rel_diff", "inside", "applicable", "source", "note", "interval"]
    if places is None or not len(places) or not len(rows):
        return pd.DataFrame(columns=cols)
    placed = dict(zip(places["terminal"].astype(str),
                      zip(places["area"].astype(str), places["lat_deg"].astype(float))))
    rows = rows[rows["terminal"].astype(str).isin(placed)]
    terms = rows["terminal"].astype(str)
    rows = rows.assign(_area=terms.map(lambda t: placed[t][0]),
                       _band=terms.map(lambda t: math.floor(placed[t][1])))
    out = []
    for (area, policy, quantity), g in rows.groupby(["_area", "policy", "quantity"],
                                                    sort=False):
        ok = g[g["applicable"].astype(bool)]
        na = g[~g["applicable"].astype(bool)]
        if len(na):
            out.append({"area": area, "band": "", "terminals": na["terminal"].nunique(),
                        "policy": policy, "quantity": quantity, "simulated": math.nan,
                        "analytic": math.nan, "rel_diff": math.nan, "inside": "-",
                        "applicable": False, "source": "", "interval": "",
                        "note": na["note"].iloc[0]})
        for band, bd in ok.groupby("_band", sort=True):
            sim, ana = float(bd["simulated"].mean()), float(bd["analytic"].mean())
            judged = [v for v in bd["inside_interval"].tolist()
                      if v is not pd.NA and v is not None]
            out.append({"area": area, "band": f"lat {band}..{band + 1}",
                        "terminals": bd["terminal"].nunique(), "policy": policy,
                        "quantity": quantity, "simulated": sim, "analytic": ana,
                        "rel_diff": sim / ana - 1.0 if np.isfinite(ana) and ana != 0
                        else math.nan,
                        "inside": f"{sum(bool(v) for v in judged)}/{len(judged)}" if judged
                        else "-", "applicable": True, "source": bd["source"].iloc[0],
                        # one note for the band: not a pooled terminal's own spread
                        "note": re.sub(r"; analytic values differ across runs by [^;]*", "",
                                       str(bd["note"].iloc[0])),
                        "interval": bd["interval"].iloc[0]})
    return pd.DataFrame(out, columns=cols)


def _area_lines(rows: pd.DataFrame, places: pd.DataFrame | None, refs: dict) -> list[str]:
    """The text lines of :func:`area_bands`."""
    out = []
    for _, r in area_bands(rows, places).iterrows():
        label = f"{r['area']} ({r['terminals']})"
        if not r["applicable"]:
            out.append(f"{label:<14} {r['policy']:<18} {r['quantity']:<44} {r['note']}")
            continue
        ref = refs.setdefault((r["source"], r["note"], r["interval"]), len(refs) + 1)
        rel = f"{r['rel_diff']:>+9.2%}" if np.isfinite(r["rel_diff"]) else f"{'-':>9}"
        where = f"{_fmt(r['simulated'])} mean, {r['band']} ({r['terminals']})"
        out.append(f"{r['area']:<14} {r['policy']:<18} {r['quantity'][:44]:<44} {where:<30} "
                   f"{_fmt(r['analytic']):>10} {rel}  {r['inside']:<6}  [{ref}]")
    return out


def places_of(folder: str | Path) -> pd.DataFrame | None:
    """Terminal, area and latitude of a run folder's generated terminals (its ``map`` table),
    or of a sweep's (every run's map; a terminal that is not at the same place in all of them,
    random points under a seed axis, is left out: its pooled rows have no one latitude).
    None without areas."""
    folder = Path(folder)
    found = [f for f in [folder / "map.parquet"] + sorted((folder / "_runs").glob("*/map.parquet"))
             if f.is_file()]
    if not found:
        return None
    mp = pd.concat([pd.read_parquet(f, columns=["terminal", "area", "lat_deg", "lon_deg"])
                    for f in found], ignore_index=True)
    if not len(mp):
        return None
    mp["terminal"] = mp["terminal"].astype(str)
    same = mp.groupby("terminal")[["lat_deg", "lon_deg"]].agg(lambda v: v.max() - v.min())
    fixed = set(same.index[(same["lat_deg"] < 1e-9) & (same["lon_deg"] < 1e-9)])
    mp = mp[mp["terminal"].isin(fixed)].drop_duplicates("terminal")
    return mp[["terminal", "area", "lat_deg"]] if len(mp) else None


def _fmt(v: float) -> str:
    return "nan" if not np.isfinite(v) else f"{v:.4g}"


def format_comparison(df: pd.DataFrame, title: str | None = None,
                      places: pd.DataFrame | None = None) -> str:
    """Plain-text table: one line per row, then the numbered sources and notes, the geometry
    of each terminal and what the intervals cover.  With ``places`` (the ``map`` table's
    ``terminal``, ``area`` and ``lat_deg`` of generated terminals) an area's terminals are
    shown by 1-degree latitude band instead of one by one: the mean simulated and analytic
    values of the band's terminals and how many of their intervals hold the analytic value
    (every terminal's row stays in the Parquet table)."""
    lines = []
    if title:
        lines += [title, ""]
    head = (f"{'terminal':<14} {'policy':<18} {'quantity':<44} {'simulated (95% interval)':<30} "
            f"{'analytic':>10} {'rel diff':>9}  inside  ref")
    lines.append(head)
    lines.append("-" * len(head))
    refs: dict[tuple[str, str, str], int] = {}
    generated = df["terminal"].astype(str).isin(
        set() if places is None else set(places["terminal"].astype(str)))
    for group, g in df.groupby(df["group"].fillna(""), sort=False):
        if group:
            lines.append(f"-- runs with {group}")
        for _, r in g[~generated.loc[g.index]].iterrows():
            lines.append(_comparison_line(r, refs))
        lines += _area_lines(g[generated.loc[g.index]], places, refs)
    if refs:
        lines.append("")
        for (source, note, interval), ref in refs.items():
            lines.append(f"[{ref}] {source}" + (f"; {note}" if note else "")
                         + (f"; interval: {interval}" if interval else ""))
    geos = df[df["applicable"] & (df["geometry"] != "") & ~generated].drop_duplicates(
        "terminal")
    if len(geos):
        lines.append("")
        lines += [f"geometry of {r['terminal']}: {r['geometry']}" for _, r in geos.iterrows()]
    if generated.any():
        lines.append("")
        lines.append("geometry of each generated terminal: the geometry column of the Parquet "
                     "table")
    runs = int(df["runs"].max()) if len(df) else 1
    lines.append("")
    if runs <= 1:
        lines.append("Intervals of a single run cover its time sampling only, not the variation "
                     "between draws of the constellation; run a sweep over seeds and `dwell "
                     "compare SWEEPDIR` for that.")
    else:
        lines.append("Intervals: Student-t over the pooled runs' values (spread across seeds), "
                     "except where the runs agree exactly (see each reference).")
    return "\n".join(lines) + "\n"
