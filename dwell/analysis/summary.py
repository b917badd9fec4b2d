"""Summary statistics per terminal x policy, with confidence intervals.

Intervals (95 %):

- handover, ping-pong and failure rates: exact Poisson (Garwood) intervals on the counts
  (:func:`dwell.analysis.analytic.poisson_rate_interval`); handovers are not exactly Poisson, so read
  them as indicative;
- mean dwell and outage fraction: percentile bootstrap over clock hours of the scenario
  (``scipy.stats.bootstrap``, resampling whole hours keeps the within-hour correlation),
  with a fixed random state so results repeat.

Dwell statistics use completed links only (neither started by initial access nor cut by the
scenario's end) when there are any.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from . import intervals as iv
from .analytic import poisson_rate_interval

CCDF_POINTS = 200


def hour_edges(duration_s: float) -> np.ndarray:
    """Edges of the clock hours of a scenario, the last one cut at its end."""
    return np.unique(np.minimum(np.arange(0.0, duration_s + 3600.0, 3600.0), duration_s))


def ratio_interval(num: np.ndarray, den: np.ndarray, seed: int, n_resamples: int = 999
                   ) -> tuple[float, float]:
    """95 % percentile-bootstrap interval of sum(num)/sum(den) over resampled units (NaN when
    fewer than 3 units or all alike)."""
    ok = den > 0
    if ok.sum() < 3 or np.all(num[ok] == num[ok][0]) and np.all(den[ok] == den[ok][0]):
        return math.nan, math.nan
    res = stats.bootstrap((num, den), lambda a, b, axis=-1: np.sum(a, axis=axis) / np.sum(b, axis=axis),
                          paired=True, vectorized=True, n_resamples=n_resamples,
                          method="percentile", confidence_level=0.95,
                          random_state=np.random.default_rng(seed))
    return float(res.confidence_interval.low), float(res.confidence_interval.high)


def per_hour(a: np.ndarray, b: np.ndarray, edges: np.ndarray,
             weight: np.ndarray | float = 1.0) -> np.ndarray:
    """Integral over each hour bin of a step function equal to ``weight`` on [a, b)."""
    out = np.zeros(edges.size - 1)
    for i in range(edges.size - 1):   # one pass per hour (tens), intervals vectorised
        out[i] = np.sum(weight * np.clip(np.minimum(b, edges[i + 1]) - np.maximum(a, edges[i]),
                                         0, None))
    return out


def _worst_hour(t: np.ndarray, edges: np.ndarray) -> int:
    """Most events in one clock hour (full hours only, when the run has any)."""
    per = np.histogram(t, bins=edges)[0] if t.size else np.zeros(edges.size - 1, dtype=int)
    full = np.diff(edges) >= 3600.0 - 1e-6
    return int(per[full].max()) if full.any() else int(per.max(initial=0))


def outcomes(handovers: pd.DataFrame) -> pd.Series:
    """Each handover attempt's outcome as text ("success" for tables without the column)."""
    if "outcome" not in handovers.columns:
        return pd.Series(["success"] * len(handovers), index=handovers.index, dtype=object)
    return handovers["outcome"].astype(str)


def successful(handovers: pd.DataFrame) -> pd.DataFrame:
    """The handovers that happened (not the attempts that failed or came too late)."""
    return handovers[outcomes(handovers) == "success"]


def summarize(links: pd.DataFrame, handovers: pd.DataFrame, outages: pd.DataFrame,
              visible: pd.DataFrame, budget: dict[str, float], duration_s: float,
              failures: int, preparing: list[tuple], seed: int, sinr=None,
              idle: int = 0) -> dict:
    """One summary row for one run (see the module docstring for the intervals).

    Handovers count every change of serving cell that happened (attempts that failed or came
    too late are counted apart); ``satellite_changes`` only those to another
    satellite (the antenna re-points) and ``beam_changes`` those within one satellite.  Slew,
    re-pointing and the make-before-break aperture count concern satellite changes only.
    ``sinr`` is the run's serving-SINR histogram (:class:`dwell.kernel.common.SinrHistogram`).
    """
    hours = duration_s / 3600.0
    attempts = handovers
    outcome = outcomes(attempts)
    handovers = successful(attempts)
    n_failed = int((outcome == "failure").sum())
    n_late = int((outcome == "too-late").sum())
    n_ho = int(len(handovers))
    ho_lo, ho_hi = poisson_rate_interval(n_ho, hours)
    edges = hour_edges(duration_s)
    hour_len = np.diff(edges)
    t_ho = handovers["time_utc"].to_numpy(dtype=float)
    worst = _worst_hour(t_ho, edges)
    scope = handovers["scope"].astype(str).to_numpy() if "scope" in handovers.columns and n_ho \
        else np.full(n_ho, "inter-satellite")
    inter = scope == "inter-satellite"
    n_sat, n_beam = int(inter.sum()), int((~inter).sum())
    sat_lo, sat_hi = poisson_rate_interval(n_sat, hours)
    beam_lo, beam_hi = poisson_rate_interval(n_beam, hours)

    complete = links[(links["start_reason"] != "initial") & (links["end_reason"] != "end")]
    dw = (complete if len(complete) else links)["dwell_s"].to_numpy(dtype=float)
    d_start = (complete if len(complete) else links)["start_utc"].to_numpy(dtype=float)
    if dw.size:
        h = np.clip(np.searchsorted(edges, d_start, side="right") - 1, 0, edges.size - 2)
        dsum = np.bincount(h, weights=dw, minlength=edges.size - 1)
        dcnt = np.bincount(h, minlength=edges.size - 1).astype(float)
        dw_lo, dw_hi = ratio_interval(dsum, dcnt, seed)
        q5, q50, q95 = np.percentile(dw, [5, 50, 95])
    else:
        dw_lo = dw_hi = q5 = q50 = q95 = math.nan

    real = outages[outages["cause"] != "switching"]
    oa = real["start_utc"].to_numpy(dtype=float)
    ob = real["end_utc"].to_numpy(dtype=float)
    out_s = float(np.sum(ob - oa))
    per_hour_out = per_hour(oa, ob, edges)
    o_lo, o_hi = ratio_interval(per_hour_out, hour_len, seed + 1)
    n_pp = int(handovers["ping_pong"].sum()) if n_ho else 0
    pp_lo, pp_hi = poisson_rate_interval(n_pp, hours)
    slew = handovers["slew_angle_deg"].to_numpy(dtype=float)[inter]
    prep_s = float(sum(b - a for a, b in preparing))
    rep = handovers["repoint_s"].to_numpy(dtype=float)[inter]
    t_sat = t_ho[inter]
    # make-before-break: to be ready at a satellite change, an aperture starts slewing
    # repoint_s before it and then serves the new link to its end; the apertures needed are
    # the most busy at once (serving or slewing) over the run
    need = mbb_apertures(links, handovers)
    vis_dur = visible["duration_s"].to_numpy(dtype=float)
    vis_n = visible["in_view"].to_numpy(dtype=float)
    row = {
        "duration_h": hours,
        "handovers": n_ho,
        "handover_attempts": int(len(attempts)),
        "handover_failures": n_failed,
        "too_late_handovers": n_late,
        "handovers_per_hour": n_ho / hours,
        "handovers_per_hour_lo": ho_lo, "handovers_per_hour_hi": ho_hi,
        "worst_hour_handovers": worst,
        "satellite_changes": n_sat,
        "satellite_changes_per_hour": n_sat / hours,
        "satellite_changes_per_hour_lo": sat_lo, "satellite_changes_per_hour_hi": sat_hi,
        "worst_hour_satellite_changes": _worst_hour(t_sat, edges),
        "beam_changes": n_beam,
        "beam_changes_per_hour": n_beam / hours,
        "beam_changes_per_hour_lo": beam_lo, "beam_changes_per_hour_hi": beam_hi,
        "links": int(len(links)),
        "dwell_mean_s": float(dw.mean()) if dw.size else math.nan,
        "dwell_mean_lo_s": dw_lo, "dwell_mean_hi_s": dw_hi,
        "dwell_median_s": float(q50), "dwell_p5_s": float(q5), "dwell_p95_s": float(q95),
        "outage_fraction": out_s / duration_s,
        "outage_fraction_lo": o_lo, "outage_fraction_hi": o_hi,
        "outage_events": int(len(real)),
        "outage_mean_s": float((ob - oa).mean()) if oa.size else 0.0,
        "outage_max_s": float((ob - oa).max()) if oa.size else 0.0,
        "ping_pongs": n_pp,
        "ping_pongs_per_hour": n_pp / hours,
        "ping_pong_per_hour_lo": pp_lo, "ping_pong_per_hour_hi": pp_hi,
        "ping_pong_fraction": n_pp / n_ho if n_ho else 0.0,
        # kept for compatibility: the same per-handover fraction under its first name
        "ping_pong_rate": n_pp / n_ho if n_ho else 0.0,
        "radio_link_failures": int(failures),
        "idle_transitions": int(idle),
        "serving_s": budget["serving_s"], "switching_s": budget["switching_s"],
        "outage_s": out_s,
        "switching_fraction": budget["switching_s"] / duration_s,
        # unavailable: no service for whatever reason, outage and switching breaks together
        "unavailability_fraction": (out_s + budget["switching_s"]) / duration_s,
        "slew_mean_deg": float(slew.mean()) if slew.size else 0.0,
        "slew_p95_deg": float(np.percentile(slew, 95)) if slew.size else 0.0,
        "slew_max_deg": float(slew.max()) if slew.size else 0.0,
        "doppler_step_mean_hz": _abs_mean(handovers, "to_doppler_hz", "from_doppler_hz"),
        "doppler_step_max_hz": _abs_max(handovers, "to_doppler_hz", "from_doppler_hz"),
        "delay_step_max_ms": _abs_max(handovers, "to_delay_ms", "from_delay_ms"),
        "mbb_overlap_fraction": prep_s / duration_s,
        "mbb_apertures_needed": int(need),
        "mean_in_view": float(np.sum(vis_dur * vis_n) / duration_s),
        "none_in_view_fraction": float(np.sum(vis_dur[vis_n == 0]) / duration_s),
        **sinr_stats(sinr),
    }
    for cause in ("no-satellite", "obstruction", "no-cell", "weak-signal", "failure",
                  "repointing"):
        sel = real["cause"] == cause
        row[f"outage_{cause.replace('-', '_')}_fraction"] = float(
            (real.loc[sel, "end_utc"] - real.loc[sel, "start_utc"]).sum() / duration_s)
    return row


def idle_columns(row: dict, idle: bool, handovers: pd.DataFrame) -> dict:
    """Columns of idle-mode (reselection) policies, from a summary row: reselections (trigger
    "reselection"; cell selections after the camped cell stopped being suitable are
    ``selections``), time camped and not camped per hour, and camping losses (no suitable
    cell; idle mode has no radio link failure, so that column is 0).  NaN / 0 for connected
    policies."""
    if not idle:
        return {"reselections": 0, "reselections_per_hour": 0.0, "selections": 0,
                "camped_s_per_hour": math.nan, "not_camped_s_per_hour": math.nan,
                "camping_losses": 0}
    hours = row["duration_h"]
    trig = successful(handovers)["trigger"].astype(str)
    n_res = int((trig == "reselection").sum())
    return {"reselections": n_res, "reselections_per_hour": n_res / hours,
            "selections": int((trig == "selection").sum()),
            "camped_s_per_hour": row["serving_s"] / hours,
            "not_camped_s_per_hour": (row["outage_s"] + row["switching_s"]) / hours,
            "camping_losses": row["radio_link_failures"], "radio_link_failures": 0,
            "idle_transitions": 0}


def mbb_apertures(links: pd.DataFrame, handovers: pd.DataFrame) -> int:
    """Apertures a make-before-break terminal needs so that each satellite change finds one
    already pointed: the aperture of a link that begins with a satellite change is busy from
    ``repoint_s`` before the change (slewing) to the link's end; any other link's aperture
    from its start to its end.  The answer is the most apertures busy at once (1 with no
    satellite change).  Cost: a sort of the links."""
    if len(links) == 0:
        return 1
    start = links["start_utc"].to_numpy(dtype=float).copy()
    end = links["end_utc"].to_numpy(dtype=float)
    if len(handovers) and "scope" in handovers.columns:
        inter = handovers["scope"].astype(str).to_numpy() == "inter-satellite"
        t_ho = handovers["time_utc"].to_numpy(dtype=float)[inter]
        rep = handovers["repoint_s"].to_numpy(dtype=float)[inter]
        # the link a change opens starts at the change plus its break: match by order
        reason = links["start_reason"].astype(str).to_numpy()
        sat = links["satellite"].astype(str).to_numpy()
        opened = np.flatnonzero(reason == "handover")
        new_sat = np.zeros(opened.size, bool)
        prev = np.maximum(opened - 1, 0)
        new_sat = sat[opened] != sat[prev]
        targets = opened[new_sat]
        k = min(targets.size, t_ho.size)
        start[targets[:k]] = t_ho[:k] - rep[:k]
    return max(1, iv.max_overlap(start, end))


def sinr_stats(hist) -> dict[str, float]:
    """Mean (of dB values) and 5th percentile of the serving SINR over the instants served
    with the serving cell measured (the percentile read off 0.1 dB bins, linear inside a bin)."""
    if hist is None or hist.n == 0:
        return {"serving_sinr_mean_db": math.nan, "serving_sinr_p5_db": math.nan}
    counts = hist.counts.sum(axis=0).astype(float)
    cum = np.cumsum(counts)
    target = 0.05 * cum[-1]
    b = int(np.searchsorted(cum, target, side="left"))
    lo = hist.LO_DB + hist.STEP_DB * (b - 1)          # bin b covers [lo, lo + step)
    before = cum[b - 1] if b > 0 else 0.0
    frac = (target - before) / counts[b] if counts[b] > 0 else 0.0
    p5 = lo + frac * hist.STEP_DB if 0 < b < counts.size - 1 else (hist.LO_DB if b == 0
                                                                   else hist.HI_DB)
    return {"serving_sinr_mean_db": hist.sum_db / hist.n, "serving_sinr_p5_db": float(p5)}


SINR_GRID_DB = np.round(np.arange(-30.0, 50.0 + 1e-9, 0.5), 6)


def sinr_ccdf_frame(hist) -> pd.DataFrame:
    """Per clock hour: the fraction of served instants whose serving SINR exceeds each value of
    a -30..50 dB grid (0.5 dB steps), with the number of instants (read off 0.1 dB bins: a
    value counts as above T when its bin starts at or above T)."""
    cols = {"hour": [], "sinr_db": [], "ccdf": [], "rows": []}
    if hist is None:
        return pd.DataFrame(cols)
    j = np.rint((SINR_GRID_DB - hist.LO_DB) / hist.STEP_DB).astype(np.int64)
    for h in range(hist.n_hours):
        c = hist.counts[h]
        n = int(c.sum())
        if n == 0:
            continue
        above = np.cumsum(c[::-1])[::-1]            # above[b] = count in bins b..end
        frac = above[np.minimum(j + 1, c.size - 1)] / n
        cols["hour"].append(np.full(j.size, h, dtype=np.int32))
        cols["sinr_db"].append(SINR_GRID_DB)
        cols["ccdf"].append(frac)
        cols["rows"].append(np.full(j.size, n, dtype=np.int64))
    if not cols["hour"]:
        return pd.DataFrame({"hour": np.zeros(0, np.int32), "sinr_db": np.zeros(0),
                             "ccdf": np.zeros(0), "rows": np.zeros(0, np.int64)})
    return pd.DataFrame({k: np.concatenate(v) for k, v in cols.items()})


def _steps(df: pd.DataFrame, a: str, b: str) -> np.ndarray:
    if a not in df.columns or b not in df.columns or len(df) == 0:
        return np.zeros(0)
    d = np.abs(df[a].to_numpy(dtype=float) - df[b].to_numpy(dtype=float))
    return d[np.isfinite(d)]


def _abs_mean(df, a, b) -> float:
    d = _steps(df, a, b)
    return float(d.mean()) if d.size else math.nan


def _abs_max(df, a, b) -> float:
    d = _steps(df, a, b)
    return float(d.max()) if d.size else math.nan


def dwell_ccdf(links: pd.DataFrame) -> pd.DataFrame:
    """Empirical complementary CDF of dwell, P(dwell > x), on up to CCDF_POINTS points."""
    complete = links[(links["start_reason"] != "initial") & (links["end_reason"] != "end")]
    dw = np.sort((complete if len(complete) else links)["dwell_s"].to_numpy(dtype=float))
    if dw.size == 0:
        return pd.DataFrame({"dwell_s": [], "ccdf": []})
    x = np.unique(np.quantile(dw, np.linspace(0, 1, min(CCDF_POINTS, dw.size))))
    ccdf = 1.0 - np.searchsorted(dw, x, side="right") / dw.size
    return pd.DataFrame({"dwell_s": x, "ccdf": ccdf})
