"""The ``dwell`` command line.

Every command checks all its input before doing any work; bad input prints one line naming the
file, key and value, and exits with status 2 having written nothing.
"""

from __future__ import annotations

import functools
import sys
from pathlib import Path

import click

from . import __version__
from .io.atomic import OutputError, check_output
from .io.errors import InputError
from .io.text import format_table


def _warn(msg: str) -> None:
    click.echo(msg, err=True)


def guarded(fn):
    """Turn input and output errors into one line on stderr and exit status 2."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except InputError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)
        except OutputError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)
    return wrapper


class Progress:
    """A one-line progress display on stderr (silent when stderr is not a terminal)."""

    def __init__(self, label: str, enabled: bool | None = None):
        self.label = label
        self.enabled = sys.stderr.isatty() if enabled is None else enabled

    def __call__(self, done: int, total: int) -> None:
        if self.enabled:
            click.echo(f"\r{self.label}: {done}/{total}", err=True, nl=done >= total)

    def hours(self, done_s: float, total_s: float) -> None:
        if self.enabled:
            click.echo(f"\r{self.label}: {done_s / 3600:.1f}/{total_s / 3600:.1f}", err=True,
                       nl=done_s >= total_s)


@click.group()
@click.version_option(__version__, prog_name="dwell")
def main() -> None:
    """Handover rate, dwell, outage and switching budget of terminals served by moving
    satellites."""


@main.command()
@click.argument("config", type=click.Path(dir_okay=False, path_type=Path))
@click.option("-o", "--output", "out", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Parquet file for the pass table.")
@guarded
def passes(config: Path, out: Path) -> None:
    """Find every visibility window (pass) of every terminal; write them to Parquet."""
    from .io.config import load_scenario
    from .io.outputs import pass_summary, passes_frame, visible_frame
    from .io.tables import write_frame
    from .orbits.geometry import Geometry

    check_output(out, folder=False)
    scen = load_scenario(config, warn=_warn)
    geo = Geometry(scen, warn=_warn, slots=False)
    geo.run_all(Progress("geometry chunks"))
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
              help="Processes to split the terminals over (results do not depend on it).")
@guarded
def run(config: Path, out: Path, kernel: str, check: bool, workers: int) -> None:
    """Run every terminal under every policy; write tables to a folder."""
    from .io.config import load_scenario
    from .run import execute, summary_text

    check_output(out, folder=True)
    scen = load_scenario(config, warn=_warn)
    if not scen.policies:
        raise InputError(str(config), "[[policy]]", None, "dwell run needs at least one policy",
                         show_value=False)
    tables = execute(scen, out, kernel=kernel, check=check, warn=_warn, workers=workers,
                     progress=Progress("simulated hours", None).hours)
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
@guarded
def mask(config: Path, terminal: str, out: Path, step_deg: float, at_s: float) -> None:
    """Export the elevation mask a terminal sees (one realisation of its canyon)."""
    import numpy as np

    from .analysis.plots import mask_plot
    from .io.atomic import write_text
    from .io.config import load_scenario

    check_output(out, folder=False)
    scen = load_scenario(config, warn=_warn)
    names = scen.terminal_names()
    if terminal not in names:
        raise InputError(str(config), "--terminal", terminal,
                         "no such terminal (known: " + ", ".join(names) + ")")
    site = scen.sites[names.index(terminal)]
    if not site.obstructions:
        raise InputError(str(config), "--terminal", terminal, "this terminal has no mask or canyon")
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
    from .analysis.compare import format_comparison, write_comparison
    from .io.atomic import write_text

    if (outdir / "_sweep.toml").exists():
        from .analysis.ensemble import compare_sweep
        df = compare_sweep(outdir)
        text = format_comparison(df, "runs pooled over seeds (groups: see the group column)")
        # underscore names: Parquet dataset readers of the sweep folder skip them
        write_text(outdir / "_comparison.txt", text)
        write_comparison(df, outdir / "_comparison.parquet")
    else:
        from .analysis.compare import compare_run
        from .io.config import load_scenario
        _need(outdir, "run.toml")
        df = compare_run(outdir)
        text = format_comparison(df)
        write_text(outdir / "comparison.txt", text)
        write_comparison(df, outdir / "comparison.parquet",
                         load_scenario(outdir / "run.toml", build=False))  # provenance only
    click.echo(text, nl=False)


@main.command()
@click.argument("outdir", type=click.Path(file_okay=False, exists=True, path_type=Path))
@click.option("--terminal", default=None, help="Terminal for the timeline and sky view (default: last).")
@click.option("--hour", default=0, show_default=True, type=click.IntRange(0),
              help="Hour of the scenario for the timeline and sky view.")
@click.option("--policy", default=None, help="Policy whose serving segments the sky view draws.")
@guarded
def plot(outdir: Path, terminal: str | None, hour: int, policy: str | None) -> None:
    """Draw a run's (or a sweep's) figures as PNG files in OUTDIR/plots."""
    if (outdir / "_sweep.toml").exists():
        from .sweep.plots import plot_sweep
        files = plot_sweep(outdir)
    else:
        from .analysis.report import plot_run
        _need(outdir, "run.toml")
        files = plot_run(outdir, terminal, hour, policy)
    for f in files:
        click.echo(f"wrote {f}")


@main.command()
@click.option("--quick", is_flag=True, help="Small versions of every case (about a minute).")
@click.option("-o", "--output", "out", default="bench-results", show_default=True,
              type=click.Path(file_okay=False, path_type=Path), help="Folder for bench.parquet/json.")
@guarded
def bench(quick: bool, out: Path) -> None:
    """Measure speed and memory against reference implementations, side by side."""
    from .bench import format_bench, run_bench, write_bench

    check_output(out, folder=True)
    df, exps = run_bench(quick, lambda msg: click.echo(msg, err=True))
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
@guarded
def sweep(sweep_file: Path, out: Path, workers: int, executor: str, scheduler: str | None,
          dry_run: bool) -> None:
    """Run a parameter sweep; resumes where an interrupted one stopped."""
    from .sweep import execute_sweep, load_sweep, pending
    from .sweep.execute import estimate_cost_s

    plan = load_sweep(sweep_file)
    if not dry_run:
        check_output(out, folder=True)
    left = pending(plan, out) if out.exists() else plan.tasks
    n_left = sum(len(v) for v in left.values())
    cost = estimate_cost_s(plan)
    click.echo(f"{len(plan.runs)} runs in {len(plan.tasks)} tasks ({n_left} not yet done); "
               f"about {cost / 60:.1f} CPU-minutes, {cost / 60 / max(1, workers):.1f} minutes "
               f"on {workers} worker(s) (rough estimate)")
    if dry_run:
        return
    bar = Progress("runs", None)

    def show(done, failed, total, eta):
        if bar.enabled:
            left_txt = "" if eta != eta else f", about {eta / 60:.1f} min left"
            click.echo(f"\rruns: {done + failed}/{total} ({failed} failed{left_txt})   ", err=True,
                       nl=done + failed >= total)

    rep = execute_sweep(plan, out, workers=workers, executor=executor, scheduler=scheduler,
                        progress=show)
    click.echo(f"done {rep.done}, failed {rep.failed}, skipped {rep.skipped} (already finished) "
               f"of {rep.total} runs in {rep.seconds:.0f} s -> {out}")
    for e in rep.errors[:10]:
        click.echo(f"failed: {e}", err=True)


def _need(outdir: Path, name: str) -> None:
    if not (outdir / name).is_file():
        raise InputError(str(outdir), None, None, f"not a dwell run folder (no {name})")


if __name__ == "__main__":
    main()
