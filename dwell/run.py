"""A whole run: geometry, every terminal under every policy, tables, invariants, one folder.

The output folder holds ``passes``, ``links``, ``handovers``, ``outages``, ``visible``,
``summary`` and ``dwell_ccdf`` as Parquet (one file each, with provenance metadata),
``summary.txt``, and ``run.toml``, the fully resolved configuration that repeats the run; and
the population tables built from the whole run: ``map`` and ``areas`` (the terminals generated
by ``[[area]]`` tables, :mod:`dwell.analysis.population`), ``load``, ``load_peaks`` and
``load_bursts`` (handovers per second into and out of each satellite and cell,
:mod:`dwell.analysis.load`).
The folder is built under a temporary name and renamed into place when complete, so it is
either whole or absent.  A run of more than one batch of terminals (or on several processes)
stores the per-event tables part by part as batches finish (:mod:`dwell.io.parts`) and builds
the load tables a range of elements at a time, so memory does not grow with the population.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import tomli_w

from .analysis.records import SiteCoverage, handovers_frame, links_frame, outages_frame
from .analysis.summary import (dwell_ccdf, idle_columns, sinr_ccdf_frame, successful,
                               summarize)
from .io.atomic import atomic_dir
from .io.config import Scenario
from .io.estimate import TERMINAL_BATCH
from .io.outputs import passes_frame, visible_frame
from .io.parts import FrameSource, PartStore, TableParts
from .io.tables import arrow_columns, provenance, write_frame, write_tables
from .io.text import format_table
from .kernel import RunResult, run_scenario
from .radio.cells import cell_names

TABLES = ("passes", "links", "handovers", "outages", "visible", "summary", "dwell_ccdf",
          "sinr_ccdf")
# built from every terminal's tables at once (after the terminal groups are joined)
POPULATION_TABLES = ("map", "areas", "load", "load_peaks", "load_bursts")
# the per-event tables: stored part by part when a run has several batches of terminals
STREAMED = tuple(t for t in TABLES if t != "summary")
RUN_TOML_HEAD = "# Fully resolved configuration of this run"
# what dwell writes into a run folder: the run itself, then `dwell compare`, `dwell plot`
# and `dwell report`
RUN_FILES = frozenset([f"{t}.parquet" for t in TABLES + POPULATION_TABLES + ("trace",)] +
                       ["run.toml", "summary.txt", "comparison.txt", "comparison.parquet",
                        "report.html"])
PLOTS_FOLDER = "plots"


class InvariantError(AssertionError):
    """A run broke one of the accounting invariants (a bug, not bad input)."""


@dataclass
class RunTables:
    """A run's tables by name (times in scenario seconds) and, for a run of one batch in one
    process, its per-terminal results.  After a run whose tables were stored part by part,
    ``frames`` reads the per-event tables back from the run folder when first asked for
    (:class:`FolderFrames`)."""
    frames: dict[str, pd.DataFrame]
    results: list[RunResult]


class FolderFrames(dict):
    """Frames of a written run folder, read when first asked for: ``*_utc`` columns back in
    scenario seconds (rounded to the microsecond, as the files hold them)."""

    def __init__(self, folder: str | Path, epoch, frames: dict[str, pd.DataFrame]):
        super().__init__(frames)
        self.folder, self.epoch = Path(folder), epoch

    def __contains__(self, name) -> bool:
        return super().__contains__(name) or (self.folder / f"{name}.parquet").is_file()

    def __missing__(self, name: str) -> pd.DataFrame:
        path = self.folder / f"{name}.parquet"
        if not path.is_file():
            raise KeyError(name)
        from .analysis.hourly import seconds_since
        df = pd.read_parquet(path)
        start = pd.Timestamp(self.epoch.start)
        for c in df.columns:
            if c.endswith("_utc") and str(df[c].dtype).startswith("datetime64"):
                df[c] = seconds_since(df[c], start)
        self[name] = df
        return df


def build_tables(scen: Scenario, results: list[RunResult], geo, *, check: bool = False
                 ) -> RunTables:
    names = scen.constellation.names
    tables = [c["name"] for c in scen.constellations]

    def cname(cells):
        return cell_names(cells, names, tables)

    passes = passes_frame(geo)
    visible = visible_frame(geo)
    uncovered = {res.site_index: res.uncovered for res in results}
    cov = {}
    for k in range(len(geo.sites)):
        cov[k] = SiteCoverage(geo.window_frame(k), geo.window_frame(k, floor_passes=True),
                              geo.duration_s, uncovered.get(k))
    links, hos, outs, rows, ccdfs, sinrs = [], [], [], [], [], []
    for res in results:
        lf = links_frame(res, names, cname, cov[res.site_index])
        hf = handovers_frame(res, names, float(scen.link.get("frequency_ghz", 2.0)), cname)
        of, budget = outages_frame(res, cov[res.site_index])
        vis = visible[visible["terminal"] == res.terminal]
        row = {"terminal": res.terminal, "policy": res.policy}
        row.update(summarize(lf, hf, of, vis, budget, geo.duration_s,
                             len(res.records.failures), res.records.preparing, scen.seed,
                             res.records.sinr, len(res.records.idle)))
        row.update(idle_columns(row, res.settings.idle, hf))
        sc = sinr_ccdf_frame(res.records.sinr)
        sc.insert(0, "policy", res.policy)
        sc.insert(0, "terminal", res.terminal)
        sinrs.append(sc)
        if check:
            check_invariants(res, lf, hf, of, budget, row, cov[res.site_index], geo.duration_s)
        c = dwell_ccdf(lf)
        c.insert(0, "policy", res.policy)
        c.insert(0, "terminal", res.terminal)
        links.append(lf.drop(columns=["sat_index"]))
        hos.append(hf)
        outs.append(of)
        rows.append(row)
        ccdfs.append(c)
    frames = {
        "passes": passes.drop(columns=["rise_s", "set_s"]),
        "links": pd.concat(links, ignore_index=True),
        "handovers": pd.concat(hos, ignore_index=True),
        "outages": pd.concat(outs, ignore_index=True),
        "visible": visible,
        "summary": pd.DataFrame(rows),
        "dwell_ccdf": pd.concat(ccdfs, ignore_index=True),
        "sinr_ccdf": pd.concat(sinrs, ignore_index=True),
    }
    return RunTables(frames, results)


def check_invariants(res: RunResult, links: pd.DataFrame, hos: pd.DataFrame, outs: pd.DataFrame,
                     budget: dict, row: dict, cov: SiteCoverage, duration_s: float) -> None:
    """The accounting every run must satisfy; raises InvariantError naming the run."""
    who = f"{res.terminal}/{res.policy}"
    tol = 1e-6 * max(1.0, duration_s)
    total = budget["serving_s"] + budget["switching_s"] + budget["outage_s"]
    if abs(total - duration_s) > tol:
        raise InvariantError(f"{who}: serving + switching + outage = {total} != {duration_s}")
    if abs(outs["duration_s"].sum() - budget["switching_s"] - budget["outage_s"]) > tol:
        raise InvariantError(f"{who}: outage rows do not add up to the outage budget")
    for ap, g in links.groupby("aperture"):
        s = g["start_utc"].to_numpy()
        e = g["end_utc"].to_numpy()
        order = np.argsort(s)
        if np.any(s[order][1:] < e[order][:-1] - 1e-9):
            raise InvariantError(f"{who}: overlapping links on aperture {ap}")
    done = [h for h in res.records.handovers if h[23] == "success"]
    hos = successful(hos)
    targets = np.array([h[2] for h in done], dtype=np.int64)
    times = hos["time_utc"].to_numpy(dtype=float)
    ok = cov.in_window(targets, times) if targets.size else np.zeros(0, bool)
    if not ok.all():
        raise InvariantError(f"{who}: handover at {times[~ok][0]} s to a satellite not in view")
    if row["handovers"] != len(hos) or row["links"] != len(links):
        raise InvariantError(f"{who}: summary counts differ from the tables")


def map_and_areas(scen: Scenario, summary: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """The ``map`` and ``areas`` tables of a whole run from its summary."""
    from .analysis.population import areas_frame, map_frame

    names = scen.terminal_names()
    pop = scen.population
    first = pop.first_index if pop is not None else len(names)
    mp = map_frame(summary, pop, first, names)
    return {"map": mp, "areas": areas_frame(mp, [a["name"] for a in scen.areas],
                                            [p["name"] for p in scen.policies])}


def _count(n: int, one: str, many: str | None = None) -> str:
    return f"{n} {one if n == 1 else (many or one + 's')}"


def summary_text(scen: Scenario, summary: pd.DataFrame) -> str:
    cols = {"terminal": "terminal", "policy": "policy", "handovers_per_hour": "HO/h",
            "worst_hour_handovers": "worst h", "dwell_mean_s": "dwell mean s",
            "dwell_median_s": "dwell med s", "outage_fraction": "outage",
            "ping_pong_rate": "ping-pong", "radio_link_failures": "RLF",
            "slew_mean_deg": "slew deg", "switching_s": "switch s"}
    head = (f"scenario {scen.scenario['name']}: {_count(len(scen.constellation), 'satellite')}, "
            f"{_count(len(scen.terminals), 'terminal')}, "
            f"{_count(len(scen.policies), 'policy', 'policies')}, "
            f"{float(scen.scenario['duration_s']) / 3600:g} h from {scen.scenario['start']}")
    if not scen.areas:
        return head + "\n" + format_table(summary, cols) + "\n"
    # generated terminals are summarised per area (weighted means; map.parquet has each one)
    listed = summary[~summary["terminal"].astype(str).isin(
        scen.terminal_names()[scen.population.first_index:])]
    per_area = map_and_areas(scen, summary)["areas"]
    text = head + "\n"
    if len(listed):
        text += format_table(listed, cols) + "\n"
    text += "areas (weighted means over each area's terminals):\n" + format_table(per_area, {
        "area": "area", "policy": "policy", "terminals": "terminals", "weight": "weight",
        "handovers_per_hour_mean": "HO/h", "handovers_per_hour_max": "HO/h max",
        "satellite_changes_per_hour_mean": "sat ch/h", "outage_fraction_mean": "outage",
        "outage_fraction_max": "outage max", "mean_in_view_mean": "in view"}) + "\n"
    return text


# TERMINAL_BATCH terminals run at once in one process: their measurement streams and visibility
# windows live together (about 7 MB per terminal at 1 s rows), later batches reuse the memory;
# their tables are joined in terminal order, as the workers' are
def run_tables(scen: Scenario, terminals: list[int] | None = None, *, kernel: str = "fast",
               check: bool = False, progress: Callable[[float, float], None] | None = None,
               warn: Callable[[str], None] | None = None, trace: str | None = None,
               batch: int | None = None, parts: PartStore | None = None) -> RunTables:
    """Run (some of) a scenario's terminals and build their tables (with the measurement
    trace of terminal ``trace`` when it is among them).

    Terminals run ``batch`` (default ``TERMINAL_BATCH``) at a time, each batch with a geometry
    of its own (SGP4 once per chunk and batch), so memory is bounded by the batch and the
    tables, not by the number of terminals; every terminal's results depend on nothing but its
    own index, so the tables are those of one batch holding them all.  With ``parts`` each
    batch's per-event tables (``STREAMED``) are stored there as it finishes and only the
    summary (and the trace) are returned, so nothing grows with the number of terminals but
    the summary."""
    chosen = list(range(len(scen.terminals))) if terminals is None else list(terminals)
    batch = max(1, int(batch or TERMINAL_BATCH))
    groups = [chosen[i:i + batch] for i in range(0, len(chosen), batch)] or [chosen]
    seen: set[str] = set()

    def warn_once(msg: str) -> None:        # every batch propagates, so warnings repeat
        if msg not in seen and warn is not None:
            warn(msg)
        seen.add(msg)

    kept = []
    for g, group in enumerate(groups):
        def part_progress(t: float, total: float, g: int = g) -> None:
            progress((g + t / total) * total / len(groups), total)
        results, geo = run_scenario(scen, kernel=kernel, terminals=group, warn=warn_once,
                                    progress=part_progress if progress is not None else None)
        tables = build_tables(scen, results, geo, check=check)
        if trace is not None:
            mine = [r for r in results if r.terminal == trace]
            if mine:
                from .analysis.trace import trace_frame
                names, shells = scen.constellation.names, [c["name"] for c in scen.constellations]
                tables.frames["trace"] = trace_frame(
                    scen, geo, mine[0].site_index, mine, lambda c: cell_names(c, names, shells),
                    float(scen.scenario["measurement_period_s"]))
        geo.close()
        if parts is not None:
            parts.add({name: tables.frames.pop(name) for name in STREAMED}, group[0] if group
                      else 0)
        elif len(groups) == 1:
            return tables
        kept.append(tables.frames)
        del results, tables, geo
    return RunTables(_concatenated(kept), [])


def _concatenated(frames: list[dict[str, pd.DataFrame]]) -> dict[str, pd.DataFrame]:
    """The tables of terminal groups (in terminal order) as one run's; the trace from the
    group holding it."""
    out = {name: pd.concat([f[name] for f in frames], ignore_index=True)
           for name in TABLES if frames and name in frames[0]}
    for f in frames:
        if "trace" in f:
            out["trace"] = f["trace"]
    return out


_SHARED: dict = {}   # the scenario a forked worker inherits (scenario objects hold SGP4 records)


def _worker(args) -> tuple[tuple[dict[str, pd.DataFrame], list[str]], list]:
    index, terminals, kernel, check, trace = args
    store = _SHARED["stores"][index]      # inherited open: parts go to the parent's file
    messages: list[str] = []      # handed back for the parent to print: a worker's stderr
    done_s = _SHARED.get("done_s")  # shared with the parent: simulated seconds per worker

    def note(t: float, _total: float) -> None:
        done_s[index] = t
    frames = run_tables(_SHARED["scen"], terminals, kernel=kernel, check=check,  # may be a copy
                        warn=messages.append, progress=note if done_s is not None else None,
                        trace=trace, parts=store).frames
    return (frames, messages), store.parts


def execute(scen: Scenario, out_dir: str | Path, *, kernel: str = "fast", check: bool = False,
            progress: Callable[[float, float], None] | None = None,
            warn: Callable[[str], None] | None = None, workers: int = 1,
            trace: str | None = None, executor: str = "local",
            scheduler: str | None = None,
            writing: Callable[[float, float, str], None] | None = None) -> RunTables:
    """Run a scenario and write its folder atomically.

    With ``workers`` > 1 the terminals are split into contiguous groups run by forked worker
    processes (each propagates the constellation itself); every terminal's results depend on
    nothing but its own index, so the tables are identical to a one-process run.  With
    ``executor = "dask"`` the groups are tasks on a dask.distributed cluster (the scheduler at
    ``scheduler``, or a local cluster of ``workers`` processes), with the same tables.
    A run of one batch of terminals in one process keeps its tables in memory; any other
    stores the per-event tables part by part in anonymous files (:mod:`dwell.io.parts`) and
    returns them as :class:`FolderFrames`.  ``writing(done, total, table)`` follows the
    writing of the folder, a table at a time (the long last step of a large run).
    """
    n = len(scen.terminals)
    workers = max(1, min(workers, n))
    if executor != "dask" and workers == 1 and n <= TERMINAL_BATCH:
        tables = run_tables(scen, kernel=kernel, check=check, progress=progress, warn=warn,
                            trace=trace)
        tables.frames.update(write_run_folder(scen, tables, out_dir, writing))
        return tables
    parts = TableParts(Path(out_dir).absolute().parent)   # anonymous files: see io/parts.py
    try:
        if executor == "dask":
            frames = _run_dask(scen, kernel, check, progress, warn, workers, trace, scheduler,
                               parts)
        elif workers == 1:
            frames = run_tables(scen, kernel=kernel, check=check, progress=progress, warn=warn,
                                trace=trace, parts=parts.store()).frames
        else:
            frames = _run_forked(scen, kernel, check, progress, warn, workers, trace, parts)
        with atomic_dir(out_dir, may_replace=run_folder_problem) as tmp:
            small = _write_tables(scen, tmp, frames, parts, out_dir, keep_load=False,
                                  writing=writing)
    finally:
        parts.close()
    return RunTables(FolderFrames(out_dir, scen.epoch, {**frames, **small}), [])


def _run_forked(scen: Scenario, kernel: str, check: bool,
                progress: Callable[[float, float], None] | None,
                warn: Callable[[str], None] | None, workers: int, trace: str | None,
                parts: TableParts) -> dict[str, pd.DataFrame]:
    """Contiguous terminal groups in forked processes that die with this one; each stores its
    per-event tables in ``parts`` and hands back its summary (and the trace)."""
    from .io.errors import RunFailed
    from .io.processes import each_in_a_process
    n = len(scen.terminals)
    bounds = np.linspace(0, n, workers + 1).round().astype(int)
    groups = [list(range(a, b)) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]
    import multiprocessing as mp
    ctx = mp.get_context("fork")
    _SHARED["scen"] = scen
    _SHARED["stores"] = [parts.store() for _ in groups]
    _SHARED["done_s"] = ctx.Array("d", len(groups), lock=False) if progress else None
    results: list = [None] * len(groups)
    duration_s = float(scen.scenario["duration_s"])

    def tick() -> None:
        progress(sum(_SHARED["done_s"]) / len(groups), duration_s)

    outcomes = each_in_a_process(_worker, [(i, g, kernel, check, trace)
                                           for i, g in enumerate(groups)], len(groups),
                                 tick if progress is not None else None)
    try:
        for res in outcomes:
            if res.error is not None:
                raise res.error
            if not res.ok:
                names = [scen.terminals[k]["name"] for k in groups[res.index]]
                raise RunFailed(f"terminals {names[0]}..{names[-1]}: {res.died}; "
                                "nothing was written")
            results[res.index], parts.stores[res.index].parts = res.value
    finally:
        outcomes.close()         # kills the groups still running, if any
        _SHARED.clear()
    return _joined(results, warn)


def _joined(parts: list[tuple[dict[str, pd.DataFrame], list[str]]],
            warn: Callable[[str], None] | None) -> dict[str, pd.DataFrame]:
    """The tables of terminal groups (in terminal order) joined into one run's; each group's
    warnings reported once (every group propagates, so they repeat)."""
    seen: set[str] = set()
    for _, messages in parts:
        for msg in messages:
            if msg not in seen and warn is not None:
                warn(msg)
            seen.add(msg)
    return _concatenated([p[0] for p in parts])


_DASK_SCENARIOS: dict[str, Scenario] = {}     # per dask worker process: the last scenario built


def _dask_group(resolved: dict, source: str, base_dir: str, config_hash: str,
                terminals: list[int], kernel: str, check: bool, trace: str | None
                ) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """One terminal group on a dask worker: the scenario is rebuilt from its resolved
    configuration (once per worker process and configuration; referenced files must be
    readable at the same paths there), then run as a local worker would."""
    from .io.config import scenario_from_dict

    messages: list[str] = []
    scen = _DASK_SCENARIOS.get(config_hash)
    if scen is None:
        scen = scenario_from_dict(resolved, source, Path(base_dir), warn=messages.append,
                                  load_plugins=True)
        _DASK_SCENARIOS.clear()
        _DASK_SCENARIOS[config_hash] = scen
    from .obstruction import build_site
    for k in terminals:      # fresh sites: a site's line-of-sight state changes as it runs
        scen.sites[k] = build_site(scen.terminals[k], scen, k, messages.append)
    frames = run_tables(scen, terminals, kernel=kernel, check=check, warn=messages.append,
                        trace=trace).frames
    return frames, messages


def dask_client(workers: int, scheduler: str | None):
    """(client, local cluster or None): a client of the scheduler at ``scheduler``, or of a
    new local cluster of ``workers`` single-threaded processes.  InputError when dask is not
    installed."""
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        from .io.errors import InputError
        raise InputError("--executor", None, "dask", "needs the cluster extra: "
                         "pip install -e '.[cluster]'") from None
    if scheduler:
        return Client(scheduler), None
    cluster = LocalCluster(n_workers=max(1, workers), threads_per_worker=1, processes=True,
                           dashboard_address=None)
    return Client(cluster), cluster


def _run_dask(scen: Scenario, kernel: str, check: bool,
              progress: Callable[[float, float], None] | None,
              warn: Callable[[str], None] | None, workers: int, trace: str | None,
              scheduler: str | None, parts: TableParts) -> dict[str, pd.DataFrame]:
    """Terminal groups as tasks on a dask.distributed cluster, joined in terminal order (so
    the tables equal a local run's).  At least two groups per worker thread keep the workers
    busy while a slow group finishes, and none holds more than ``TERMINAL_BATCH`` terminals:
    each group's per-event tables come back to this process, which stores them in ``parts``
    as they arrive (workers need not share its file system).  Each group propagates the
    constellation itself."""
    from .io.errors import InputError, RunFailed

    client, cluster = dask_client(workers, scheduler)
    store = parts.store()
    try:
        from dask.distributed import as_completed
        threads = max(1, sum(client.nthreads().values()))
        n = len(scen.terminals)
        count = min(n, max(2 * threads, -(-n // TERMINAL_BATCH)))
        bounds = np.linspace(0, n, count + 1).round().astype(int)
        groups = [list(range(a, b)) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]
        resolved = scen.resolved()
        args = (resolved, scen.source, str(scen.base_dir), scen.config_hash())
        futures = [client.submit(_dask_group, *args, g, kernel, check, trace, pure=False)
                   for g in groups]
        index = {f.key: i for i, f in enumerate(futures)}
        results: list = [None] * len(groups)
        duration_s = float(scen.scenario["duration_s"])
        done = 0
        for fut in as_completed(futures):
            i = index[fut.key]
            try:
                frames, messages = fut.result()
            except InputError:
                raise
            except Exception as exc:      # a lost worker (dask retries, then gives up), a bug
                names = [scen.terminals[k]["name"] for k in groups[i]]
                raise RunFailed(f"terminals {names[0]}..{names[-1]}: {type(exc).__name__}: "
                                f"{exc}; nothing was written") from exc
            store.add({name: frames.pop(name) for name in STREAMED}, groups[i][0])
            results[i] = (frames, messages)
            fut.release()
            done += 1
            if progress is not None:
                progress(duration_s * done / len(groups), duration_s)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return _joined(results, warn)


def run_folder_problem(folder: str | Path) -> str | None:
    """Why an existing folder must not be replaced by a run folder, or None if it may be.

    A folder may be replaced when it is empty or is a dwell run folder: its ``run.toml`` starts
    with the header dwell writes, its ``summary.parquet`` carries dwell's provenance metadata,
    and it holds nothing else than what dwell writes there (the tables, ``run.toml``,
    ``summary.txt``, ``comparison.*``, ``plots/*.png`` and the temporary names of atomic writes).
    Anything else in it is someone's data, which a replacement would delete.  Costs a listing
    and one Parquet footer read.
    """
    folder = Path(folder)
    entries = sorted(folder.iterdir())
    if not entries:
        return None
    for p in entries:
        if p.name.startswith(".") and ".tmp" in p.name:
            continue                                 # an interrupted atomic write of ours
        if p.name == PLOTS_FOLDER and p.is_dir() and not p.is_symlink():
            odd = [q for q in p.iterdir() if not (q.suffix == ".png" and q.is_file()
                                                  or q.name.startswith("."))]
            if odd:
                return _not_ours(odd[0].relative_to(folder))
            continue
        if p.name not in RUN_FILES or not p.is_file() or p.is_symlink():
            return _not_ours(p.relative_to(folder))
    try:
        head = (folder / "run.toml").read_text(encoding="utf-8").split("\n", 1)[0]
        from .io.tables import read_metadata
        marked = "dwell.config_sha256" in read_metadata(folder / "summary.parquet")
    except Exception:       # unreadable, not Parquet, not ours: the same answer
        head, marked = "", False
    if not head.startswith(RUN_TOML_HEAD) or not marked:
        return "is not a dwell run folder (no run.toml and summary.parquet written by dwell)"
    return None


def _not_ours(name: Path) -> str:
    return (f"holds {name}, which dwell did not write; refusing to replace the folder "
            "(choose another -o)")


def write_run_folder(scen: Scenario, tables: RunTables, out_dir: str | Path,
                     writing: Callable[[float, float, str], None] | None = None
                     ) -> dict[str, pd.DataFrame]:
    """Write a run's tables held in memory as its folder, atomically; returns the population
    tables it built (``map``, ``areas`` and the load tables)."""
    with atomic_dir(out_dir, may_replace=run_folder_problem) as tmp:
        return _write_tables(scen, tmp, tables.frames, FrameSource(tables.frames), out_dir,
                             keep_load=True, writing=writing)


def _write_tables(scen: Scenario, tmp: Path, frames: dict[str, pd.DataFrame],
                  source: TableParts | FrameSource, out_dir: str | Path, *,
                  keep_load: bool, writing: Callable[[float, float, str], None] | None = None
                  ) -> dict[str, pd.DataFrame]:
    """Write every table of a run into the folder ``tmp`` (to be renamed ``out_dir``): the
    per-event tables from ``source``, the summary (and trace) from ``frames``, and the
    population tables built here (the load tables from the handovers, a range of elements at
    a time); returns those built (``load`` only with ``keep_load``, else it is only written).
    The bytes do not depend on how the rows were split into parts."""
    from .analysis.load import HANDOVER_COLUMNS, bursts_frame, load_passes
    from .io.areas import terminal_weights

    meta = provenance(scen)
    steps = len(STREAMED) + 2                 # the per-event tables, load, the small ones
    done = 0

    def step(name: str) -> None:
        nonlocal done
        if writing is not None:
            writing(done, steps, name)        # the table about to be written
        done += 1

    for name in STREAMED:
        step(name)
        write_tables(source.tables(name), tmp / f"{name}.parquet", epoch=scen.epoch,
                     metadata=meta, schema=source.schema(name))
    step("load")
    built = map_and_areas(scen, frames["summary"])
    weights = dict(zip(scen.terminal_names(), terminal_weights(scen).tolist()))
    policies = [p["name"] for p in scen.policies]
    loads, peaks, bursts = [], [], []

    def load_rows():
        for load, peak, burst in load_passes(
                lambda: source.tables("handovers", list(HANDOVER_COLUMNS)), weights, policies,
                float(scen.scenario["duration_s"])):
            peaks.append(peak)
            bursts.append(burst)
            if keep_load:
                loads.append(load)
            yield arrow_columns(load)
    write_tables(load_rows(), tmp / "load.parquet", epoch=scen.epoch, metadata=meta)
    built["load_peaks"] = pd.concat(peaks, ignore_index=True)
    built["load_bursts"] = bursts_frame(bursts, policies)
    if keep_load:
        built["load"] = pd.concat(loads, ignore_index=True)
    step("summary, map, areas")
    for name in ("summary", "trace"):
        if name in frames:
            write_frame(frames[name], tmp / f"{name}.parquet", scen)
    for name in ("map", "areas", "load_peaks", "load_bursts"):
        write_frame(built[name], tmp / f"{name}.parquet", scen)
    (tmp / "run.toml").write_text(run_toml(scen, out_dir))
    (tmp / "summary.txt").write_text(summary_text(scen, frames["summary"]))
    if writing is not None:
        writing(steps, steps, "done")
    return built


def run_toml(scen: Scenario, folder: str | Path | None = None) -> str:
    """The resolved configuration as TOML; file references relative to ``folder`` (where the
    run.toml will live) so that the folder and its inputs can move together."""
    import os

    from .io.config import PATH_KEYS
    resolved = scen.resolved()
    if folder is not None:
        here = Path(folder).resolve()

        def rel(p: str) -> str:
            try:
                return os.path.relpath(p, here)
            except ValueError:          # another drive: keep it absolute
                return p
        for table in (resolved.get("constellation", []) + resolved.get("terminal", [])
                      + resolved.get("area", [])):
            for key in PATH_KEYS:
                if isinstance(table.get(key), str):
                    table[key] = rel(table[key])
        for table in resolved.get("policy", []):
            rule = table.get("rule", "")
            if ":" in rule and rule.split(":", 1)[0].endswith(".py"):
                file, cls = rule.split(":", 1)
                table["rule"] = rel(file) + ":" + cls
    head = (f"{RUN_TOML_HEAD}: `dwell run run.toml -o DIR` repeats it.\n"
            f"# config sha256 {scen.config_hash()}\n")
    return head + tomli_w.dumps(resolved)


