"""Ensembles over seeds: ``dwell compare SWEEPDIR`` pools the runs of a sweep that differ only
in seeds and compares the ensemble mean with the analytic value.

A sweep folder (layout in :mod:`dwell.sweep.execute`) holds one ``summary-<run key>.parquet``
per finished run, whose ``dwell.sweep_params`` metadata lists the run's axis values.  Runs
whose axis values agree except on seed axes (keys ending in ``seed``: ``scenario.seed``,
``constellation.<name>.seed``, ...) form a group; every run is compared on its own
(:func:`dwell.analysis.compare.compare_run`, reading visible and passes from the task folder)
and each row is pooled over the group: the mean of the runs' simulated values with a 95 %
Student-t interval ``mean +- t(0.975, n - 1) sd / sqrt(n)`` over the n runs' values.  That
interval covers the spread between draws (of the constellation, of shadowing and noise), which
a single run's interval does not.  Where every run has the same value (the seeds do not
change it, e.g. a Walker shell's geometry), there is no spread: the runs' own interval is
kept and the ``interval`` column says so.  A row applies to the group only if it applies to
every run.

Cost: one :func:`compare_run` per run.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from ..io.errors import InputError
from ..io.tables import read_metadata
from .compare import compare_run, frame


def is_seed_axis(key: str) -> bool:
    """Whether a sweep axis only reseeds (its key's last part is ``seed``)."""
    return key.split(".")[-1] == "seed"


def sweep_runs(sweep_dir: str | Path) -> pd.DataFrame:
    """One row per finished run of a sweep: run_key, task_key, group (the non-seed axis values
    as text) and seeds (the seed axis values as text), sorted by group then run key."""
    sweep_dir = Path(sweep_dir)
    rows = []
    for path in sorted(sweep_dir.glob("summary-*.parquet")):
        meta = read_metadata(path)
        params = json.loads(meta.get("dwell.sweep_params", "{}"))
        keys = pd.read_parquet(path, columns=["run_key", "task_key"])
        if not len(keys):
            continue
        group = ", ".join(f"{k}={json.dumps(v, default=str)}" for k, v in sorted(params.items())
                          if not is_seed_axis(k))
        seeds = ", ".join(f"{k}={v}" for k, v in sorted(params.items()) if is_seed_axis(k))
        rows.append({"run_key": str(keys["run_key"].iloc[0]),
                     "task_key": str(keys["task_key"].iloc[0]), "group": group, "seeds": seeds})
    if not rows:
        raise InputError(str(sweep_dir), None, None, "no finished runs (no summary-*.parquet)")
    return pd.DataFrame(rows).sort_values(["group", "run_key"]).reset_index(drop=True)


def pool(tables: list[pd.DataFrame], group: str = "") -> pd.DataFrame:
    """Pool comparison tables of runs that differ only in seeds, row by row (same terminal,
    policy and quantity); see the module docstring for the interval."""
    n_runs = len(tables)
    allrows = pd.concat([t.assign(_run=i) for i, t in enumerate(tables)], ignore_index=True)
    out = []
    keys = ["terminal", "policy", "quantity"]
    order = allrows.drop_duplicates(keys)[keys]
    grouped = {k: g for k, g in allrows.groupby(keys, sort=False)}
    for key in order.itertuples(index=False):
        g = grouped[tuple(key)]
        first = g.iloc[0].to_dict()
        first.pop("_run")
        if len(g) < n_runs or not g["applicable"].all():
            bad = g[~g["applicable"]]
            reason = (bad["note"].iloc[0].removeprefix("not applicable: ") if len(bad)
                      else "missing in some runs")
            first.update({"simulated": math.nan, "sim_lo": math.nan, "sim_hi": math.nan,
                          "analytic": math.nan, "rel_diff": math.nan, "inside_interval": None,
                          "applicable": False, "interval": "", "runs": n_runs, "group": group,
                          "note": f"not applicable: {reason}"
                                  + (f" ({len(bad)} of {n_runs} runs)" if len(bad) < n_runs
                                     else "")})
            out.append(first)
            continue
        x = g["simulated"].to_numpy(dtype=float)
        ana = float(np.mean(g["analytic"].to_numpy(dtype=float)))
        mean = float(np.mean(x))
        interval = f"Student-t over {x.size} runs' values (spread across seeds)"
        if x.size >= 2 and np.ptp(x) == 0.0:
            # the seeds do not change this value (e.g. a Walker shell's geometry): there is no
            # spread to pool, so keep the runs' own interval and say so
            lo, hi = float(first["sim_lo"]), float(first["sim_hi"])
            interval = f"the {x.size} runs agree exactly (seeds do not change it); " \
                       f"{first['interval']}"
        elif x.size >= 2:
            half = float(stats.t.ppf(0.975, x.size - 1) * np.std(x, ddof=1) / math.sqrt(x.size))
            lo, hi = mean - half, mean + half
        else:
            lo = hi = math.nan
        spread = np.ptp(g["analytic"].to_numpy(dtype=float))
        note = first["note"]
        if np.isfinite(ana) and ana != 0 and spread > 1e-6 * abs(ana):
            note += f"; analytic values differ across runs by {spread / abs(ana):.2%} (mean shown)"
        ok = np.isfinite(ana) and np.isfinite(lo)
        first.update({"simulated": mean, "sim_lo": lo, "sim_hi": hi, "analytic": ana,
                      "rel_diff": (mean - ana) / ana if np.isfinite(ana) and ana != 0 else math.nan,
                      "inside_interval": bool(lo <= ana <= hi) if ok else None,
                      "interval": interval,
                      "runs": int(x.size), "group": group, "note": note})
        out.append(first)
    return frame(out)


def compare_sweep(sweep_dir: str | Path) -> pd.DataFrame:
    """The pooled comparison of every group of a sweep (module docstring)."""
    sweep_dir = Path(sweep_dir)
    runs = sweep_runs(sweep_dir)
    parts = []
    for group, members in runs.groupby("group", sort=False):
        tables = [compare_run(sweep_dir / "_runs" / key) for key in members["run_key"]]
        parts.append(pool(tables, group))
    return frame([r for p in parts for r in p.to_dict("records")])
