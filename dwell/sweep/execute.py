"""Running a sweep: tasks on local processes or a dask.distributed cluster, results as one
Parquet dataset that resumes safely.

Layout of the output folder (``pandas.read_parquet(DIR)`` reads the combined summary; folders
and files starting with ``_`` or ``.`` are ignored by Parquet dataset readers)::

    DIR/summary-<run key>.parquet     one per finished run: its summary rows + parameter columns
    DIR/_runs/<run key>/              links, handovers, outages, dwell_ccdf, summary, run.toml
                                      (and map, areas when the scenario has [[area]] tables)
    DIR/_tasks/<task key>/            passes and visible (shared by the task's runs)
    DIR/_failed/<run key>.json        the error of a failed run (retried on the next start)
    DIR/_sweep.toml                   the sweep file, for the record
    DIR/_plan.json                    the plan's fingerprint: which sweep this folder holds
    DIR/_lock                         held (flock) by the sweep running in the folder

A run is finished when its summary file exists; every file and folder is written under a
temporary name and renamed into place, so an interrupted sweep leaves nothing half-written and
a restart skips exactly the finished runs.  Run keys hash the content of every referenced file,
so an edited mask, element set, track or plug-in gives new runs; a folder holding another plan
(other axes, edited inputs) is refused unless ``fresh`` clears what dwell wrote there.

Locally every task runs in a forked process of its own (:mod:`dwell.io.processes`): a task
that runs out of memory, or whose process dies otherwise, is recorded in ``_failed/`` and the
sweep goes on; workers die with the sweep.  A task of more than one batch of terminals (an
area) keeps its per-event tables in anonymous part files (:mod:`dwell.io.parts`), not in memory.
"""

from __future__ import annotations

import copy
import fcntl
import json
import math
import os
import re
import shutil
import time
from contextlib import closing, contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

import pandas as pd

from ..io.atomic import OutputError, atomic_dir, write_bytes, write_text
from .spec import Run, SweepPlan

RUN_TABLES = ("links", "handovers", "outages", "dwell_ccdf", "sinr_ccdf", "summary")
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
    (run key, "done" | "failed", message) per run.  A task of more than one batch of terminals
    (an area) stores its per-event tables part by part (:mod:`dwell.io.parts`) and writes each
    run's tables from the parts, so its memory does not grow with the population.
    """
    from ..io.config import scenario_from_dict
    from ..io.parts import FrameSource, TableParts
    from ..io.tables import provenance, write_frame, write_tables
    from ..run import TERMINAL_BATCH, map_and_areas, run_tables, run_toml

    out = Path(out_dir)
    parts = None
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

        def warn(msg: str) -> None:       # workers report on the sweep's stderr, a line at
            sys.stderr.write(f"{msg} [task {task_key}]\n")     # a time (one write each)
            sys.stderr.flush()

        # the scenario's own warnings were given, once each, when the sweep was checked
        # (spec.check_runs); only what the run finds is said here
        scen = scenario_from_dict(combined, "sweep task", Path(base_dir), load_plugins=True)
        if len(scen.terminals) > TERMINAL_BATCH:
            parts = TableParts(out)                 # anonymous files: gone however this ends
            frames = run_tables(scen, check=True, warn=warn, parts=parts.store()).frames
            source, schema_of = parts, parts.schema
        else:
            frames = run_tables(scen, check=True, warn=warn).frames
            source, schema_of = FrameSource(frames), lambda name: None  # as written before
        with atomic_dir(out / "_tasks" / task_key) as tmp:
            for name in TASK_TABLES:
                write_tables(source.tables(name), tmp / f"{name}.parquet", epoch=scen.epoch,
                             metadata=provenance(scen), schema=source.schema(name))
        status = []
        for j, r in enumerate(runs):
            mine = {k: name for k, (jj, name) in owner.items() if jj == j}
            run_scen = scenario_from_dict(copy.deepcopy(r["scenario"]), "sweep run", Path(base_dir),
                                          load_plugins=True)
            with atomic_dir(out / "_runs" / r["key"]) as tmp:
                for name in RUN_TABLES:
                    rows = _runs_rows(frames[name] if name == "summary" else source.tables(name),
                                      mine)
                    write_tables(rows, tmp / f"{name}.parquet", epoch=run_scen.epoch,
                                 metadata=provenance(run_scen),
                                 schema=None if name == "summary" else schema_of(name))
                summ = _of_run(frames["summary"], mine)
                if run_scen.population is not None and len(run_scen.population):
                    for name, df in map_and_areas(run_scen, summ).items():   # map, areas
                        write_frame(df, tmp / f"{name}.parquet", run_scen)
                (tmp / "run.toml").write_text(run_toml(run_scen, out / "_runs" / r["key"]))
            summ = _with_areas(summ, run_scen)
            for key, col in columns.items():
                value = r["params"].get(key)
                summ[col] = value if not isinstance(value, (list, dict)) else json.dumps(value)
            summ["run_key"] = r["key"]
            summ["task_key"] = task_key
            write_frame(summ, out / f"summary-{r['key']}.parquet", run_scen,
                        {"dwell.sweep_params": json.dumps(r["params"], default=str)})
            status.append((r["key"], "done", ""))
            (out / "_failed" / f"{r['key']}.json").unlink(missing_ok=True)
        return status
    except Exception as exc:  # a failing run must not stop the sweep: record it
        return record_failure(out, runs, f"{type(exc).__name__}: {exc}")
    finally:
        if parts is not None:
            parts.close()


def _of_run(df: pd.DataFrame, mine: dict[str, str]) -> pd.DataFrame:
    """The rows of one run's policies (named internally in the task), under their own names."""
    df = df[df["policy"].astype(str).isin(list(mine))].copy()
    df["policy"] = df["policy"].astype(str).map(mine)
    return df.reset_index(drop=True)


def _with_areas(summ: pd.DataFrame, scen) -> pd.DataFrame:
    """A run's summary rows with each terminal's ``area`` (None for listed terminals) and
    ``weight`` when its scenario has ``[[area]]`` tables (the map's columns, so the combined
    summary can be grouped by area and weighted); unchanged otherwise."""
    from ..io.areas import terminal_weights

    pop = scen.population
    if pop is None or not len(pop):
        return summ
    names = scen.terminal_names()
    area = {names[pop.first_index + i]: str(a) for i, a in enumerate(pop.area.tolist())}
    weight = dict(zip(names, terminal_weights(scen).tolist()))
    term = summ["terminal"].astype(str)
    return summ.assign(area=term.map(area).astype(object).where(term.isin(area), None),
                       weight=term.map(weight).astype(float))


def _runs_rows(tables, mine: dict[str, str]):
    """One run's rows of a table given as a frame or as Arrow parts (:mod:`dwell.io.parts`),
    as Arrow parts: the same rows and types either way (parts round-trip their frames)."""
    from ..io.tables import arrow_columns

    if isinstance(tables, pd.DataFrame):
        yield arrow_columns(_of_run(tables, mine))
        return
    for table in tables:
        yield arrow_columns(_of_run(table.to_pandas(), mine))


def record_failure(out: Path, runs: list[dict], msg: str) -> list[tuple[str, str, str]]:
    """Write ``_failed/<run key>.json`` for each run of a task that failed; their statuses."""
    msg = msg if len(msg) <= 2000 else msg[:1997] + "..."
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


def task_estimates(plan: SweepPlan) -> dict[str, Any]:
    """Each task's :class:`~dwell.io.estimate.Estimate` (one process: its geometry once, all of
    its runs' policies); see that module for the model and what it was calibrated on."""
    from ..io.config import scenario_from_dict
    from ..io.estimate import estimate_run
    out = {}
    for task, runs in plan.tasks.items():
        scen = scenario_from_dict(copy.deepcopy(runs[0].scenario), plan.source, plan.base_dir,
                                  build=False)
        out[task] = estimate_run(scen, n_policies=sum(len(r.scenario["policy"]) for r in runs),
                                 streamed=False)
    return out


def estimate_cost_s(plan: SweepPlan) -> float:
    """CPU seconds of the whole sweep: the sum of its tasks' estimates (calibrated on this
    project's development machine; configs/sweep-demo.toml measured 109 s, estimated 126 s)."""
    return sum(e.cpu_s for e in task_estimates(plan).values())


def _payload(run: Run) -> dict[str, Any]:
    return {"key": run.key, "params": run.params, "scenario": run.scenario}


# ---- the folder: which sweep it holds, the lock ------------------------------------------------

PLAN_FILE = "_plan.json"
LOCK_FILE = "_lock"
# what dwell writes at the top of a sweep folder (``_plots`` by ``dwell plot``)
WRITTEN = ("_runs", "_tasks", "_failed", "_plots", "_sweep.toml", PLAN_FILE, LOCK_FILE)


def _ours(name: str) -> bool:
    return name in WRITTEN or bool(re.fullmatch(r"summary-[0-9a-f]{16}\.parquet", name)) or \
        _leftover(name)


def _leftover(name: str) -> bool:
    """A temporary name of an interrupted atomic write (``dwell.io.atomic``)."""
    return name.startswith(".") and (".tmp" in name or ".old-" in name)


def _held(out: Path) -> str | None:
    """The fingerprint of the plan a folder holds (None: no readable record)."""
    try:
        return json.loads((out / PLAN_FILE).read_text(encoding="utf-8")).get("fingerprint")
    except (OSError, ValueError, AttributeError):
        return None


def folder_problem(plan: SweepPlan, out: Path, fresh: bool = False) -> str | None:
    """Why the sweep must not run in ``out`` (read only; None when it may).

    ``out`` may be absent, empty, or hold this very plan (a resume).  A folder holding another
    plan, or a sweep of an older dwell without a plan record, needs ``fresh``; a folder holding
    files dwell did not write (and no sweep) is refused: the combined dataset would read them.
    """
    if not out.is_dir():
        return None
    names = [p.name for p in out.iterdir()]
    if (out / PLAN_FILE).is_file():
        if fresh or _held(out) == plan.fingerprint:
            return None
        return ("holds another sweep (its runs differ from this plan's: changed axes or edited "
                "input files); add --fresh to clear what dwell wrote there, or use another -o")
    if any(_ours(n) and not _leftover(n) and n != LOCK_FILE for n in names):
        if fresh:
            return None
        return ("holds a sweep without a plan record (written by an older dwell); add --fresh "
                "to clear what dwell wrote there, or use another -o")
    foreign = sorted(n for n in names if not _ours(n))
    if foreign:
        return (f"holds {foreign[0]}, which is no part of a dwell sweep; a sweep needs an empty "
                "or new folder (or one holding the same sweep)")
    return None


@contextmanager
def sweep_lock(out: Path) -> Iterator[None]:
    """Hold ``out/_lock`` (flock, released when this process ends however it ends); a second
    sweep in the same folder is refused with one line naming the holder's process id."""
    path = out / LOCK_FILE
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create {LOCK_FILE} ({exc.strerror or exc})") from None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = os.pread(fd, 32, 0).decode(errors="replace").strip() or "unknown"
        os.close(fd)
        raise OutputError(f"{out}: another dwell sweep is running in this folder (process "
                          f"{holder}); wait for it to end or use another -o") from None
    try:
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        yield
    finally:
        os.close(fd)


def _clear(out: Path, everything: bool) -> None:
    """Remove leftovers of interrupted writes; with ``everything`` all that dwell wrote."""
    for folder in (out, out / "_runs", out / "_tasks", out / "_failed"):
        if not folder.is_dir():
            continue
        for p in folder.iterdir():
            top = folder == out
            if _leftover(p.name) or (everything and top and _ours(p.name) and p.name != LOCK_FILE):
                if p.is_dir() and not p.is_symlink():
                    shutil.rmtree(p, ignore_errors=True)
                else:
                    p.unlink(missing_ok=True)


def execute_sweep(plan: SweepPlan, out_dir: str | Path, *, workers: int = 1,
                  executor: str = "local", scheduler: str | None = None,
                  progress: Callable[[int, int, int, float], None] | None = None,
                  fresh: bool = False, started: Callable[[], None] | None = None
                  ) -> SweepReport:
    """Run the plan's unfinished runs into ``out_dir`` (see the module docstring); ``fresh``
    first clears everything dwell wrote there (and so starts over).  Raises OutputError when
    the folder holds something else or another sweep is running in it; ``started()`` is
    called once the folder is known to be this sweep's, before anything is written."""
    out = Path(out_dir)
    problem = folder_problem(plan, out, fresh)
    if problem:
        raise OutputError(f"{out}: {problem}")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create ({exc.strerror or exc})") from None
    with sweep_lock(out):
        problem = folder_problem(plan, out, fresh)      # again, now that no one else writes
        if problem:
            raise OutputError(f"{out}: {problem}")
        if started is not None:
            started()
        _clear(out, everything=fresh)
        write_text(out / PLAN_FILE, json.dumps({"fingerprint": plan.fingerprint,
                                                "name": plan.name, "runs": len(plan.runs),
                                                "run_keys": sorted(r.key for r in plan.runs)},
                                               indent=1) + "\n")
        if Path(plan.source).exists():
            write_bytes(out / "_sweep.toml", Path(plan.source).read_bytes())
        return _execute(plan, out, workers, executor, scheduler, progress)


def _execute(plan: SweepPlan, out: Path, workers: int, executor: str, scheduler: str | None,
             progress) -> SweepReport:
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
    else:
        _run_local(jobs, plan, out, columns, workers, note)
    return SweepReport(total, done, failed, skipped, time.time() - t0, errors)


def _task_job(job) -> list[tuple[str, str, str]]:
    return run_task(*job)


def _run_local(jobs, plan, out, columns, workers, note) -> None:
    """Every task in a forked process of its own, ``workers`` at a time: a task whose process
    dies (out of memory) is recorded as failed and the others go on."""
    from ..io.processes import each_in_a_process
    payloads = [(task, runs, str(plan.base_dir), str(out), columns) for task, runs in jobs]
    with closing(each_in_a_process(_task_job, payloads, workers)) as outcomes:
        for res in outcomes:
            runs = jobs[res.index][1]
            if res.ok:
                note(res.value)
            elif res.error is not None:
                note(record_failure(out, runs, f"{type(res.error).__name__}: {res.error}"))
            else:
                note(record_failure(out, runs, f"{res.died} (task {jobs[res.index][0]})"))


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
        futures = {client.submit(run_task, task, runs, str(plan.base_dir), str(out), columns,
                                 pure=False): runs for task, runs in jobs}
        for fut in as_completed(list(futures)):
            try:
                note(fut.result())
            except Exception as exc:     # e.g. the worker died (dask retries, then gives up)
                note(record_failure(out, futures[fut], f"{type(exc).__name__}: {exc}"))
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def combined_summary(out_dir: str | Path) -> pd.DataFrame:
    """The sweep's combined summary, in a stable row order."""
    out = Path(out_dir)
    files = sorted(out.glob("summary-*.parquet"))
    if not files:
        return pd.DataFrame()
    # file by file, not as one dataset: a dataset takes its columns from one file, and runs a
    # sweep finished with an older dwell may lack newer columns (they read as missing here)
    df = pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)
    if "area" in df.columns and df["area"].isna().any():
        # rows from before the area columns: a generated terminal's name is its area's and
        # index, the same in every run, so its area and weight are those of its other rows
        known = df[df["area"].notna()].drop_duplicates("terminal")
        term = df["terminal"].astype(str)
        fill = df["area"].isna() & term.isin(set(known["terminal"].astype(str)))
        if fill.any():
            df["area"] = df["area"].astype(object)
            for col in ("area", "weight"):
                df.loc[fill, col] = term[fill].map(dict(zip(known["terminal"].astype(str),
                                                            known[col])))
        df.loc[df["weight"].isna() & ~fill, "weight"] = 1.0      # listed terminals weigh 1
    return df.sort_values(["run_key", "terminal", "policy"], kind="stable").reset_index(drop=True)

