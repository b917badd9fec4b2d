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
from .atomic import OutputError
from .errors import InputError


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
    from .config import load_scenario
    from .geometry import Geometry
    from .outputs import pass_summary, passes_frame, visible_frame
    from .tables import write_frame

    scen = load_scenario(config, warn=_warn)
    geo = Geometry(scen, warn=_warn)
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
@guarded
def run(config: Path, out: Path, kernel: str, check: bool) -> None:
    """Run every terminal under every policy; write tables to a folder."""
    from .config import load_scenario
    from .run import execute, summary_text

    scen = load_scenario(config, warn=_warn)
    if not scen.policies:
        raise InputError(str(config), "[[policy]]", None, "dwell run needs at least one policy",
                         show_value=False)
    tables = execute(scen, out, kernel=kernel, check=check, warn=_warn,
                     progress=Progress("simulated hours", None).hours)
    click.echo(summary_text(scen, tables.frames["summary"]), nl=False)
    click.echo(f"tables -> {out}")


def format_table(df, columns: dict[str, str], digits: int = 3) -> str:
    """Plain aligned text table of chosen columns (header labels from ``columns``)."""
    heads = list(columns.values())
    rows = []
    for _, r in df.iterrows():
        cells = []
        for key in columns:
            v = r[key]
            if isinstance(v, float):
                cells.append(f"{v:.{digits}g}" if abs(v) < 1e4 else f"{v:.0f}")
            else:
                cells.append(str(v))
        rows.append(cells)
    widths = [max(len(h), *(len(c[i]) for c in rows)) if rows else len(h)
              for i, h in enumerate(heads)]
    line = "  ".join(h.ljust(w) for h, w in zip(heads, widths))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(cells, widths)) for cells in rows]
    return "\n".join(out)


if __name__ == "__main__":
    main()
