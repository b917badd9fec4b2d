"""Running a sweep: tasks on local processes or a dask.distributed cluster, results as one
Parquet dataset that resumes safely.

Layout of the output folder (``pandas.read_parquet(DIR)`` reads the combined summary; folders
and files starting with ``_`` or ``.`` are ignored by Parquet dataset readers)::

    DIR/summary-<run key>.parquet     one per finished run: its summary rows + parameter columns
    DIR/_runs/<run key>/              links, handovers, outages, dwell_ccdf, summary, run.toml
    DIR/_tasks/<task key>/            passes and visible (shared by the task's runs)
    DIR/_failed/<run key>.json        the error of a failed run (retried on the next start)
    DIR/_sweep.toml                   the sweep file, for the record

A run is finished when its summary file exists; every file and folder is written under a
temporary name and renamed into place, so an interrupted sweep leaves nothing half-written and
a restart skips exactly the finished runs.
"""

from __future__ import annotations

import copy
import json
import math
import re
import shutil
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import pandas as pd

from ..io.atomic import atomic_dir, write_text
from .spec import Run, SweepPlan

RUN_TABLES = ("links", "handovers", "outages", "dwell_ccdf", "summary")
TASK_TABLES = ("passes", "visible")


def param_columns(plan: SweepPlan) -> dict[str, list[str]]:
    """Columns of each axis in the combined summary: ``{axis key: [column, ...]}``.

    Every axis gets a column named by its full key path (``policy.*.hysteresis_db``), so two
    axes ending in the same word never collide.  The older short column (the key's last part,
    or the key with non-word characters as ``_`` when that is taken; ``terminal_set`` and
    ``policy_set`` for the terminal and policy axes, whose full keys name the summary's own
    columns) is kept beside it for compatibility: sweeps read by earlier scripts use it.
    ``run_task`` assigns each run's value to all of an axis's columns at once
    (``summ[columns] = value`` with the list sets every one of them).
    """
    reserved = {"terminal", "policy", "run_key", "task_key"}
    out, used = {}, set()
    for ax in plan.axes:
        short = ax.key.split(".")[-1] if ax.key not in ("terminal", "policy") else f"{ax.key}_set"
        name = short if short not in used and short not in reserved else re.sub(r"\W+", "_", ax.key)
        used.add(name)
        names = [name]
        if ax.key not in reserved and ax.key != name:
            names.append(ax.key)
            used.add(ax.key)
        out[ax.key] = names
    return out


def run_task(task_key: str, runs: list[dict], base_dir: str, out_dir: str,
             columns: dict[str, str]) -> list[tuple[str, str, str]]:
    """Run every policy of one task on one geometry pass; write each run's outputs.

    ``runs`` are plain dicts (picklable for process pools and clusters).  Returns
    (run key, "done" | "failed", message) per run.
    """
    from ..io.config import scenario_from_dict
    from ..io.tables import write_frame
    from ..kernel import run_scenario
    from ..run import build_tables, run_toml

    out = Path(out_dir)
    try:
        combined = copy.deepcopy(runs[0]["scenario"])
        policies, owner = [], {}
        for j, r in enumerate(runs):
            for p in r["scenario"]["policy"]:
                internal = f"r{j}:{p.get('name') or p['rule']}"
                policies.append({**p, "name": internal})
                owner[internal] = (j, p.get("name") or p["rule"])
        combined["policy"] = policies
        import sys

        def warn(msg: str) -> None:       # workers report on the sweep's stderr
            print(f"{msg} [task {task_key}]", file=sys.stderr)

        scen = scenario_from_dict(combined, "sweep task", Path(base_dir), warn=warn)
        results, geo = run_scenario(scen, warn=warn)
        tables = build_tables(scen, results, geo, check=True)
        geo.close()
        frames = tables.frames
        with atomic_dir(out / "_tasks" / task_key) as tmp:
            for name in TASK_TABLES:
                write_frame(frames[name], tmp / f"{name}.parquet", scen)
        status = []
        for j, r in enumerate(runs):
            mine = [k for k, (jj, _) in owner.items() if jj == j]
            run_scen = scenario_from_dict(copy.deepcopy(r["scenario"]), "sweep run", Path(base_dir))
            with atomic_dir(out / "_runs" / r["key"]) as tmp:
                for name in RUN_TABLES:
                    df = frames[name]
                    df = df[df["policy"].astype(str).isin(mine)].copy()
                    df["policy"] = df["policy"].astype(str).map(lambda k: owner[k][1])
                    write_frame(df.reset_index(drop=True), tmp / f"{name}.parquet", run_scen)
                (tmp / "run.toml").write_text(run_toml(run_scen, out / "_runs" / r["key"]))
            summ = frames["summary"]
            summ = summ[summ["policy"].astype(str).isin(mine)].copy()
            summ["policy"] = summ["policy"].astype(str).map(lambda k: owner[k][1])
            for key, col in columns.items():
                value = r["params"].get(key)
                summ[col] = value if not isinstance(value, (list, dict)) else json.dumps(value)
            summ["run_key"] = r["key"]
            summ["task_key"] = task_key
            write_frame(summ.reset_index(drop=True), out / f"summary-{r['key']}.parquet", run_scen,
                        {"dwell.sweep_params": json.dumps(r["params"], default=str)})
            status.append((r["key"], "done", ""))
            (out / "_failed" / f"{r['key']}.json").unlink(missing_ok=True)
        return status
    except Exception as exc:  # a failing run must not stop the sweep: record it
        msg = f"{type(exc).__name__}: {exc}"
        for r in runs:
            (out / "_failed").mkdir(parents=True, exist_ok=True)
            write_text(out / "_failed" / f"{r['key']}.json",
                       json.dumps({"params": r["params"], "error": msg}, default=str))
        return [(r["key"], "failed", msg) for r in runs]


@dataclass
class SweepReport:
    total: int
    done: int
    failed: int
    skipped: int
    seconds: float
    errors: list[str]


def pending(plan: SweepPlan, out_dir: Path) -> dict[str, list[Run]]:
    """Tasks with their unfinished runs (a run is finished when its summary file exists)."""
    todo: dict[str, list[Run]] = {}
    for task, runs in plan.tasks.items():
        left = [r for r in runs if not (out_dir / f"summary-{r.key}.parquet").exists()]
        if left:
            todo[task] = left
    return todo


def estimate_cost_s(plan: SweepPlan) -> float:
    """Rough CPU seconds, calibrated on the demo scenario on this class of machine: per day,
    0.25 s of propagation and ~0.9 s of pass finding and measurement per terminal (both per
    1,584 satellites), and ~0.2 s of kernel per terminal and policy at a 1 s period."""
    from ..io.config import scenario_from_dict
    total = 0.0
    for runs in plan.tasks.values():
        scen = scenario_from_dict(copy.deepcopy(runs[0].scenario), plan.source, plan.base_dir,
                                  build=False)
        sats = sum(c.get("satellites") or (c.get("planes", 1) * c.get("per_plane", 0)) or 1000
                   for c in scen.constellations) / 1584.0
        days = float(scen.scenario["duration_s"]) / 86400.0
        terms = len(scen.terminals)
        n_pol = sum(len(r.scenario["policy"]) for r in runs)
        period = float(scen.scenario["measurement_period_s"])
        total += days * (0.25 * sats + terms * 0.9 * sats + terms * n_pol * 0.2 / period)
    return total


def _payload(run: Run) -> dict[str, Any]:
    return {"key": run.key, "params": run.params, "scenario": run.scenario}


def execute_sweep(plan: SweepPlan, out_dir: str | Path, *, workers: int = 1, executor: str = "local",
                  scheduler: str | None = None, progress: Callable[[int, int, int, float], None] | None = None
                  ) -> SweepReport:
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    if Path(plan.source).exists():
        shutil.copyfile(plan.source, out / "_sweep.toml")
    columns = param_columns(plan)
    todo = pending(plan, out)
    total = len(plan.runs)
    skipped = total - sum(len(v) for v in todo.values())
    done = failed = 0
    errors: list[str] = []
    t0 = time.time()
    n_todo = total - skipped

    def note(statuses):
        nonlocal done, failed
        for key, state, msg in statuses:
            if state == "done":
                done += 1
            else:
                failed += 1
                errors.append(f"{key}: {msg}")
        if progress:
            elapsed = time.time() - t0
            finished = done + failed
            eta = elapsed / finished * (n_todo - finished) if finished else math.nan
            progress(done, failed, n_todo, eta)

    jobs = [(task, [_payload(r) for r in runs]) for task, runs in sorted(todo.items())]
    if progress:
        progress(0, 0, n_todo, math.nan)
    if executor == "dask":
        _run_dask(jobs, plan, out, columns, workers, scheduler, note)
    elif workers <= 1:
        for task, runs in jobs:
            note(run_task(task, runs, str(plan.base_dir), str(out), columns))
    else:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            futures = {pool.submit(run_task, task, runs, str(plan.base_dir), str(out), columns)
                       for task, runs in jobs}
            try:
                while futures:
                    finished, futures = wait(futures, return_when=FIRST_COMPLETED)
                    for f in finished:
                        note(f.result())
            except KeyboardInterrupt:
                pool.shutdown(wait=False, cancel_futures=True)
                raise
    return SweepReport(total, done, failed, skipped, time.time() - t0, errors)


def _run_dask(jobs, plan, out, columns, workers, scheduler, note) -> None:
    try:
        from dask.distributed import Client, LocalCluster, as_completed
    except ImportError:
        from ..io.errors import InputError
        raise InputError("--executor", None, "dask", "needs the cluster extra: "
                         "pip install -e '.[cluster]'", show_value=True) from None
    cluster = None
    if scheduler:
        client = Client(scheduler)
    else:
        cluster = LocalCluster(n_workers=max(1, workers), threads_per_worker=1, processes=True,
                               dashboard_address=None)
        client = Client(cluster)
    try:
        futures = [client.submit(run_task, task, runs, str(plan.base_dir), str(out), columns,
                                 pure=False) for task, runs in jobs]
        for fut in as_completed(futures):
            note(fut.result())
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def combined_summary(out_dir: str | Path) -> pd.DataFrame:
    """The sweep's combined summary, in a stable row order."""
    out = Path(out_dir)
    if not any(out.glob("summary-*.parquet")):
        return pd.DataFrame()
    df = pd.read_parquet(out)
    return df.sort_values(["run_key", "terminal", "policy"], kind="stable").reset_index(drop=True)

