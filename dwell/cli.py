"""The ``dwell`` command line.

Every command checks all its input before doing any work; bad input prints one line naming the
file, key and value, and exits with status 2 having written nothing.
"""

from __future__ import annotations

import functools
import math
import sys
from pathlib import Path

import click

from . import __version__
from .io.atomic import OutputError, check_output
from .io.errors import InputError, RunFailed
from .io.text import format_table
from .progress import Progress


_HELD: list[str] | None = None     # warnings held back until the input is known to be good


def _warn(msg: str) -> None:
    if _HELD is not None:
        _HELD.append(msg)
    else:
        click.echo(msg, err=True)


def _input_checked() -> None:
    """The input is good: show the warnings held so far, then speak at once."""
    global _HELD
    held, _HELD = _HELD or [], None
    for msg in held:
        click.echo(msg, err=True)


def guarded(fn):
    """Turn input and output errors into one line on stderr and exit status 2 (warnings
    about input that then fails are dropped: bad input is one line)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        global _HELD
        _HELD = []
        try:
            out = fn(*args, **kwargs)
            _input_checked()
            return out
        except InputError as exc:
            _HELD = None
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)
        except OutputError as exc:
            _HELD = None
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)
        except RunFailed as exc:
            _input_checked()
            click.echo(f"error: {exc}", err=True)
            sys.exit(1)
        except MemoryError:
            click.echo("error: ran out of memory (see the estimate: dwell refuses runs larger "
                       "than the available memory unless --force is given)", err=True)
            sys.exit(1)
    return wrapper


FORCE = click.option("--force", is_flag=True,
                     help="Go ahead even if the estimate says the run does not fit in memory.")


def _checked_cost(scen, force: bool, *, workers: int = 1, kernel: str = "fast",
                  measure: bool = True):
    """Estimate before any work: refuse what cannot fit in memory (one line naming the keys
    that drive it) unless ``force``; say the cost on stderr when it is large."""
    from .io.estimate import estimate_run, refuse_if_too_big

    est = estimate_run(scen, workers=workers, kernel=kernel, measure=measure)
    refuse_if_too_big(est, scen.source, force=force)
    if est.cpu_s > 600 or est.memory_b > 4e9:
        _warn(f"note: this run needs {est.describe()} (estimate)")
    return est


@click.group()
@click.version_option(__version__, prog_name="dwell")
def main() -> None:
    """Handover rate, dwell, outage and switching budget of terminals served by moving
    satellites."""


@main.command()
@click.argument("config", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", "out", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Parquet file for the pass table.")
@FORCE
@guarded
def passes(config: Path, out: Path, force: bool) -> None:
    """Find every visibility window (pass) of every terminal; write them to Parquet."""
    from .io.config import build_scenario, load_scenario
    from .io.outputs import pass_summary, passes_frame, visible_frame
    from .io.tables import write_frame
    from .orbits.geometry import Geometry

    check_output(out, folder=False)
    scen = load_scenario(config, warn=_warn, build=False, policy_warnings=False)  # runs none
    _checked_cost(scen, force, measure=False)
    build_scenario(scen, _warn)
    _input_checked()
    geo = Geometry(scen, warn=_warn, slots=False)
    with Progress("geometry", "chunks", rate_unit="chunk") as bar:
        geo.run_all(bar.to)
    df = passes_frame(geo)
    write_frame(df, out, scen)
    vis = visible_frame(geo)
    summary = pass_summary(df, vis, geo.duration_s, scen.terminal_names())
    click.echo(f"{len(df)} windows, {len(scen.constellation)} satellites, "
               f"{geo.duration_s / 3600:g} h -> {out}")
    click.echo(format_table(summary, {
        "terminal": "terminal", "windows_per_hour": "passes/h", "mean_duration_s": "mean dur s",
        "max_duration_s": "max dur s", "mean_in_view": "mean in view",
        "none_in_view_fraction": "none in view"}))
    geo.close()


@main.command()
@click.argument("config", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", "out", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Folder for the run's tables (replaced atomically).")
@click.option("--kernel", type=click.Choice(["fast", "naive"]), default="fast", show_default=True,
              help="Event kernel, or the per-measurement reference (slow; for checking).")
@click.option("--check/--no-check", default=False, help="Verify accounting invariants.")
@click.option("--workers", default=2, show_default=True, type=click.IntRange(1),
              help="Processes to split the terminals over (results do not depend on it); "
                   "with --executor dask and no --scheduler, the local cluster's workers.")
@click.option("--executor", type=click.Choice(["local", "dask"]), default="local",
              show_default=True,
              help="local: forked processes; dask: terminal groups on a dask.distributed "
                   "cluster (same tables).")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Address of a running dask scheduler (e.g. tcp://HOST:8786); without it "
                   "--executor dask starts a local cluster.")
@click.option("--trace", "trace", default=None, metavar="TERMINAL",
              help="Also write trace.parquet: the terminal's measurements of its serving cell "
                   "and strongest neighbours at every instant, per policy.")
@click.option("--replace", is_flag=True,
              help="Replace OUTDIR if it holds an earlier run (never a folder of other files).")
@FORCE
@guarded
def run(config: Path, out: Path, kernel: str, check: bool, workers: int, executor: str,
        scheduler: str | None, trace: str | None, replace: bool, force: bool) -> None:
    """Run every terminal under every policy; write tables to a folder."""
    from .io.config import build_scenario, load_scenario
    from .io.processes import stop_on_signals
    from .run import execute, summary_text

    if scheduler is not None and executor != "dask":
        raise InputError(str(config), "--scheduler", scheduler, "is used with --executor dask "
                         "only")
    if executor == "dask":
        try:
            import dask.distributed  # noqa: F401
        except ImportError:
            raise InputError(str(config), "--executor", "dask", "needs the cluster extra: "
                             "pip install -e '.[cluster]'") from None
    _check_run_folder(out, replace)
    # runs policies, so plug-ins are loaded; nothing is built before the estimate
    scen = load_scenario(config, warn=_warn, load_plugins=True, build=False)
    _checked_cost(scen, force, workers=workers, kernel=kernel)
    build_scenario(scen, _warn)
    _input_checked()
    stop_on_signals()        # SIGTERM unwinds: workers killed, temporary folder removed
    if not scen.policies:
        raise InputError(str(config), "[[policy]]", None, "dwell run needs at least one policy",
                         show_value=False)
    if trace is not None and trace not in scen.terminal_names():
        raise InputError(str(config), "--trace", trace,
                         "no such terminal (known: " + ", ".join(scen.terminal_names()) + ")")
    with Progress("simulating", "h", scale=1 / 3600, decimals=1) as bar, \
            Progress("writing", "tables") as written:
        tables = execute(scen, out, kernel=kernel, check=check, warn=_warn, workers=workers,
                         progress=bar.to, trace=trace, executor=executor, scheduler=scheduler,
                         writing=written.to)
    click.echo(summary_text(scen, tables.frames["summary"]), nl=False)
    click.echo(f"tables -> {out}")


@main.command()
@click.argument("config", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--terminal", "terminal", required=True, help="Name of a terminal with a canyon or mask.")
@click.option("-o", "--output", "out", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="CSV file (azimuth_deg,elevation_deg); a PNG plot is written beside it.")
@click.option("--step-deg", default=0.5, show_default=True, type=click.FloatRange(0.01, 10),
              help="Azimuth step of the exported mask.")
@click.option("--at-s", default=0.0, show_default=True, type=float,
              help="Scenario time (s) of the export, for a terminal that drives.")
@FORCE
@guarded
def mask(config: Path, terminal: str, out: Path, step_deg: float, at_s: float,
         force: bool) -> None:
    """Export the elevation mask a terminal sees (one realisation of its canyon)."""
    import numpy as np

    from .analysis.plots import mask_plot
    from .io.atomic import write_text
    from .io.config import build_scenario, load_scenario
    from .io.estimate import Estimate, estimate_run, refuse_if_too_big

    check_output(out, folder=False)
    if not math.isfinite(at_s):
        raise InputError(str(config), "--at-s", at_s, "must be a finite time in seconds")
    scen = load_scenario(config, warn=_warn, build=False, policy_warnings=False)  # runs none
    # the export builds the satellites and the sites only: those parts must fit
    parts = [p for p in estimate_run(scen, measure=False).parts
             if p.what.startswith(("interpreter", "street canyon")) or "satellites" in p.what]
    refuse_if_too_big(Estimate(sum(p.bytes for p in parts), 0.0, parts), scen.source,
                      force=force)
    build_scenario(scen, _warn)
    duration_s = float(scen.scenario["duration_s"])
    if not 0.0 <= at_s <= duration_s:
        raise InputError(str(config), "--at-s", at_s,
                         f"must lie in the scenario (0..{duration_s:g} s)")
    names = scen.terminal_names()
    if terminal not in names:
        raise InputError(str(config), "--terminal", terminal,
                         "no such terminal (known: " + ", ".join(names) + ")")
    site = scen.sites[names.index(terminal)]
    if not site.obstructions:
        raise InputError(str(config), "--terminal", terminal, "this terminal has no mask or canyon")
    _input_checked()
    az = np.arange(0.0, 360.0, step_deg)
    el = np.maximum(site.mask_deg(az, np.full(az.shape, float(at_s))), 0.0)
    lines = ["azimuth_deg,elevation_deg"] + [f"{a:.4f},{e:.4f}" for a, e in zip(az, el)]
    write_text(out, "\n".join(lines) + "\n")
    png = out.with_suffix(".png")
    mask_plot(az, el, site.floor_deg, f"{terminal}: elevation mask", png)
    click.echo(f"mask of {terminal} ({az.size} azimuths, max {el.max():.1f} deg) -> {out}, {png}")


@main.command()
@click.argument("outdir", type=click.Path(file_okay=False, exists=True, path_type=Path))
@guarded
def compare(outdir: Path) -> None:
    """Compare a run's (or a sweep's seed ensembles') simulated values with analytic formulas."""
    from .analysis.compare import format_comparison, places_of, write_comparison
    from .io.atomic import write_text

    if (outdir / "_sweep.toml").exists():
        from .analysis.ensemble import compare_sweep
        df = compare_sweep(outdir)
        text = format_comparison(df, "runs pooled over seeds (groups: see the group column)",
                                 places_of(outdir))
        # underscore names: Parquet dataset readers of the sweep folder skip them
        write_text(outdir / "_comparison.txt", text)
        write_comparison(df, outdir / "_comparison.parquet")
    else:
        from .analysis.compare import compare_run
        from .io.config import load_scenario
        _need(outdir, "run.toml")
        df = compare_run(outdir)
        text = format_comparison(df, places=places_of(outdir))
        write_text(outdir / "comparison.txt", text)
        write_comparison(df, outdir / "comparison.parquet",
                         load_scenario(outdir / "run.toml", build=False))  # provenance only
    click.echo(text, nl=False)


def _view_options(fn):
    """--terminal, --hour, --policy: what the one-terminal, one-hour figures show."""
    fn = click.option("--policy", default=None,
                      help="Policy of the sky view and trace (default: the first); for a "
                           "sweep, draw only this policy's runs.")(fn)
    fn = click.option("--hour", default=None, type=int,
                      help="Scenario hour of the timeline, sky view and trace (default: 0).")(fn)
    fn = click.option("--terminal", default=None,
                      help="Terminal of the timeline, sky view and trace (default: the last); "
                           "for a sweep, draw only this terminal's figures.")(fn)
    return fn


def _is_sweep(outdir: Path) -> bool:
    return (outdir / "_sweep.toml").exists()


@main.command()
@click.argument("outdir", type=click.Path(file_okay=False, exists=True, path_type=Path))
@_view_options
@guarded
def plot(outdir: Path, terminal: str | None, hour: int | None, policy: str | None) -> None:
    """Draw a run's figures as PNG files in OUTDIR/plots (a sweep's in OUTDIR/_plots).

    The options are checked before anything is drawn; every figure is drawn before the first
    file is written."""
    if _is_sweep(outdir):
        from .sweep.plots import plot_sweep
        files = plot_sweep(outdir, terminal=terminal, policy=policy, hour=hour)
    else:
        from .analysis.figures import plot_run
        _need(outdir, "run.toml")
        files = plot_run(outdir, terminal, hour, policy)
    for f in files:
        click.echo(f"wrote {f}")


@main.command()
@click.argument("outdir", type=click.Path(file_okay=False, exists=True, path_type=Path))
@_view_options
@click.option("-o", "--output", "out", default=None,
              type=click.Path(dir_okay=False, path_type=Path),
              help="HTML file to write (default: OUTDIR/report.html; OUTDIR/_report.html for a "
                   "sweep, which keeps it out of the sweep's Parquet dataset).")
@guarded
def report(outdir: Path, terminal: str | None, hour: int | None, policy: str | None,
           out: Path | None) -> None:
    """Write one self-contained HTML page of a run or sweep folder: figures, summary and
    comparison tables, the resolved configuration and the cautions (reads offline)."""
    if out is not None:
        check_output(out, folder=False)
    if _is_sweep(outdir):
        from .sweep.report import report_sweep
        path = report_sweep(outdir, terminal=terminal, policy=policy, hour=hour, output=out)
    else:
        from .analysis.report import report_run
        _need(outdir, "run.toml")
        path = report_run(outdir, terminal, policy, hour, output=out)
    click.echo(f"wrote {path}")


@main.command()
@click.option("--quick", is_flag=True, help="Small versions of every case (about a minute).")
@click.option("-o", "--output", "out", default="bench-results", show_default=True,
              type=click.Path(file_okay=False, path_type=Path), help="Folder for bench.parquet/json.")
@guarded
def bench(quick: bool, out: Path) -> None:
    """Measure speed and memory against reference implementations, side by side."""
    from .bench import format_bench, run_bench, write_bench

    from .bench import FULL, QUICK

    check_output(out, folder=True)
    cases = QUICK if quick else FULL
    with Progress("bench", "cases", len(cases), rate_unit="case") as bar:
        started = [0]

        def show(msg: str) -> None:      # run_bench announces each case before running it
            bar.to(started[0], note=msg.removeprefix("bench: ").removesuffix(" ..."))
            started[0] += 1
        df, exps = run_bench(quick, show)
        bar.to(len(cases))
    write_bench(df, exps, out)
    click.echo(format_bench(df, exps), nl=False)
    click.echo(f"results -> {out}")


@main.command()
@click.argument("sweep_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", "out", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Dataset folder (pandas.read_parquet(DIR) gives the combined summary).")
@click.option("--workers", default=2, show_default=True, type=click.IntRange(1),
              help="Local worker processes (or dask workers of a local cluster).")
@click.option("--executor", type=click.Choice(["local", "dask"]), default="local", show_default=True)
@click.option("--scheduler", default=None, help="Address of an existing dask scheduler.")
@click.option("--dry-run", is_flag=True, help="Print how many runs and a cost estimate; run nothing.")
@click.option("--fresh", is_flag=True,
              help="Clear what dwell wrote in DIR (another sweep's results) and start over.")
@FORCE
@guarded
def sweep(sweep_file: Path, out: Path, workers: int, executor: str, scheduler: str | None,
          dry_run: bool, fresh: bool, force: bool) -> None:
    """Run a parameter sweep; resumes where an interrupted one stopped."""
    from .io.estimate import estimate_run, refuse_if_too_big
    from .io.processes import stop_on_signals
    from .sweep import execute_sweep, load_sweep, pending
    from .sweep.execute import folder_problem, task_estimates
    from .sweep.spec import check_runs

    plan = load_sweep(sweep_file)
    for msg in plan.notes:
        _warn(msg)

    def fits(scen, n_policies: int) -> None:      # each task alone must fit in memory
        refuse_if_too_big(estimate_run(scen, n_policies=n_policies, streamed=False),
                          plan.source, force=force, what="this run's task")

    # every run checked as dwell run would, before the first starts (plug-ins only run for real)
    check_runs(plan, load_plugins=not dry_run, warn=_once(_warn), each=fits)
    # the warnings wait until the folder is known to be free too (taken under the sweep's
    # lock): a refused sweep says one line
    if not dry_run:
        check_output(out, folder=True)
    problem = folder_problem(plan, out, fresh)
    if problem:
        raise OutputError(f"{out}: {problem}")
    left = pending(plan, out) if out.exists() and not fresh else plan.tasks
    n_left = sum(len(v) for v in left.values())
    estimates = task_estimates(plan)
    cost = sum(e.cpu_s for t, e in estimates.items() if t in left)
    peak = max((e.memory_b for e in estimates.values()), default=0.0)
    click.echo(f"{len(plan.runs)} runs in {len(plan.tasks)} tasks ({n_left} not yet done); "
               f"about {cost / 60:.1f} CPU-minutes, {cost / 60 / max(1, workers):.1f} minutes "
               f"on {workers} worker(s), up to {peak / 1e9:.2g} GB per task (estimate)")
    if dry_run:
        return
    stop_on_signals()        # SIGTERM unwinds: running workers are killed, the lock released
    with Progress("sweep", "runs", rate_unit="run") as bar:
        rep = execute_sweep(plan, out, workers=workers, executor=executor, scheduler=scheduler,
                            progress=lambda done, failed, total, eta:
                            bar.to(done + failed, total, f"{failed} failed"), fresh=fresh,
                            started=_input_checked)
    click.echo(f"done {rep.done}, failed {rep.failed}, skipped {rep.skipped} (already finished) "
               f"of {rep.total} runs in {rep.seconds:.0f} s -> {out}")
    for e in rep.errors[:10]:
        click.echo(f"failed: {e}", err=True)
    if rep.failed:
        sys.exit(1)          # some runs failed: recorded in DIR/_failed, retried on a restart


def _once(warn):
    """A warn function that says each message once."""
    seen: set[str] = set()

    def say(msg: str) -> None:
        if msg not in seen:
            seen.add(msg)
            warn(msg)
    return say


def _check_run_folder(out: Path, replace: bool) -> None:
    """Before any work: ``out`` can be written, and replacing it loses nothing dwell did not
    write (an existing folder must be an earlier run, and replaced only with --replace)."""
    from .run import run_folder_problem

    check_output(out, folder=True, replaces=True)
    if out.is_dir():
        problem = run_folder_problem(out)
        if problem:
            raise OutputError(f"{out}: {problem}")
        if any(out.iterdir()) and not replace:
            raise OutputError(f"{out}: holds an earlier dwell run; add --replace to replace it")


def _need(outdir: Path, name: str) -> None:
    if not (outdir / name).is_file():
        raise InputError(str(outdir), None, None, f"not a dwell run folder (no {name})")


if __name__ == "__main__":
    main()
