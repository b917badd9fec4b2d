"""``dwell report`` of a sweep folder: one self-contained HTML page with the sweep file, the
swept values, per-terminal comparison tables across the runs, the sweep figures, the combined
summary, failed runs, and each run's resolved configuration."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pandas as pd

from ..analysis.report import (Section, all_columns_html, esc, figure_html, fmt,
                               page_html, pre_html, table_html, with_interval)
from ..io.atomic import write_text
from ..io.errors import InputError
from .execute import combined_summary
from .plots import (AREA_MEAN, SweptAxis, area_means, area_terminals, render_sweep, slug,
                    swept_axes)

MAX_CONFIGS = 200     # runs whose resolved configuration the page carries in full
# the leading underscore keeps it out of the Parquet dataset: pandas.read_parquet(DIR) reads
# every file not starting with "_" or "." as part of the combined summary
SWEEP_REPORT_NAME = "_report.html"


def _sweep_name(out: Path) -> str:
    from ..io.config import read_toml
    try:
        raw = read_toml(out / "_sweep.toml")
    except InputError:
        return out.name
    sweep = raw.get("sweep")
    return str(sweep.get("name", out.name)) if isinstance(sweep, dict) else out.name


def _failed(out: Path) -> pd.DataFrame:
    rows = []
    for f in sorted((out / "_failed").glob("*.json")) if (out / "_failed").is_dir() else []:
        try:
            data = json.loads(f.read_text())
        except (OSError, ValueError):
            data = {}
        rows.append({"run key": f.stem, "parameters": json.dumps(data.get("params", {})),
                     "error": str(data.get("error", "unreadable record"))})
    return pd.DataFrame(rows, columns=["run key", "parameters", "error"])


def _comparison_columns(axes: list[SweptAxis]) -> dict[str, Any]:
    cols: dict[str, Any] = {"policy": "policy"}
    for a in axes:
        if a.column not in ("terminal_set", "policy_set"):    # shown as their own columns
            cols[a.key] = a.column
    cols.update({
        "handovers per hour [95 %]": lambda r: with_interval(
            r["handovers_per_hour"], r["handovers_per_hour_lo"], r["handovers_per_hour_hi"]),
        "outage % [95 %]": lambda r: with_interval(
            r["outage_fraction"], r["outage_fraction_lo"], r["outage_fraction_hi"], 100.0),
        "ping-pongs per hour [95 %]": lambda r: with_interval(
            r["ping_pongs"] / r["duration_h"], r["ping_pong_per_hour_lo"],
            r["ping_pong_per_hour_hi"]),
        "radio link failures": "radio_link_failures",
        "worst hour": "worst_hour_handovers",
        "dwell mean s [95 %]": lambda r: with_interval(
            r["dwell_mean_s"], r["dwell_mean_lo_s"], r["dwell_mean_hi_s"]),
        "slew p95 deg": "slew_p95_deg",
        "run key": "run_key",
    })
    return cols


def _sorted_runs(d: pd.DataFrame, axes: list[SweptAxis]) -> pd.DataFrame:
    """Rows in sweep order: by each axis's position in the sweep file, then policy."""
    keys, frame = [], d.copy()
    for i, a in enumerate(axes):
        rank = {v: j for j, v in enumerate(a.order)}
        frame[f"_r{i}"] = frame[a.column].map(rank)
        keys.append(f"_r{i}")
    return frame.sort_values(keys + ["policy"], kind="stable")


def report_sweep(out_dir: str | Path, terminal: str | None = None, policy: str | None = None,
                 hour: int | None = None, output: str | Path | None = None) -> Path:
    """Write the sweep folder's report page (default ``DIR/_report.html``); returns its path.
    Options as for ``dwell plot`` of a sweep, checked first.  Cost: the sweep figures (about a
    second per terminal) and reading each run's run.toml."""
    out = Path(out_dir)
    figures = render_sweep(out, terminal, policy, hour)      # checks the options first
    df = combined_summary(out)
    axes = swept_axes(out, df)
    failed = _failed(out)
    terms = list(dict.fromkeys(df["terminal"].astype(str)))
    view = df if policy is None else df[df["policy"].astype(str) == policy]
    # an area's terminals are compared through its weighted means (one by one on request)
    areas, in_area = area_terminals(df)
    shown_terms = [terminal] if terminal is not None else [t for t in terms if t not in in_area]
    per_area = [] if terminal is not None else [
        (a, area_means(view, a, [ax.column for ax in axes])) for a in areas]
    axes_table = pd.DataFrame({"key": [a.key for a in axes],
                               "summary column": [a.column for a in axes],
                               "values in sweep order": [", ".join(fmt(v) for v in a.order)
                                                         for a in axes]})
    comparison = "".join(
        table_html(_sorted_runs(view[view["terminal"].astype(str) == t], axes),
                   _comparison_columns(axes), f"comparison-{t}", f"{t}: runs in sweep order "
                   "(95 % intervals in brackets)", ("policy", "run key"))
        for t in shown_terms) + "".join(
        table_html(_sorted_runs(d, axes), _comparison_columns(axes),
                   f"area-comparison-{slug(name)}", f"area {name}: weighted means over its "
                   f"{int(d[AREA_MEAN].max())} terminals, runs in sweep order (no intervals)",
                   ("policy", "run key"))
        for name, d in per_area if len(d))
    sections = [
        Section("swept", "Swept values",
                table_html(axes_table, {"key": "key", "summary column": "summary column",
                                        "values in sweep order": "values in sweep order"},
                           "axes-table", "Axes that vary across the finished runs",
                           ("key", "summary column", "values in sweep order"))),
        Section("comparison", "Runs compared, per terminal", comparison),
        Section("figures", "Figures", "".join(figure_html(f) for f in figures)),
        Section("summary", "Combined summary",
                all_columns_html(df, "summary-full", f"Every column of the combined summary "
                                 f"({len(df)} rows: runs x terminals x policies)")),
    ]
    if len(failed):
        sections.append(Section("failed", "Failed runs",
                                table_html(failed, {c: c for c in failed.columns}, "failed-table",
                                           "Runs recorded in _failed/ (retried by the next "
                                           "dwell sweep)", ("run key", "parameters"),
                                           wrap_columns=("error",))))
    sweep_file = out / "_sweep.toml"
    configs = []
    for key in list(dict.fromkeys(df["run_key"].astype(str)))[:MAX_CONFIGS]:
        f = out / "_runs" / key / "run.toml"
        if f.is_file():
            configs.append(f"<details><summary>run {esc(key)}</summary>"
                           f"{pre_html(f.read_text(), f'configuration-{key}')}</details>")
    n_runs = df["run_key"].nunique()
    more = (f"<p>The first {MAX_CONFIGS} of {n_runs} runs are shown; every run's is in "
            "<code>_runs/&lt;run key&gt;/run.toml</code>.</p>" if n_runs > MAX_CONFIGS else "")
    sections.append(Section(
        "configuration", "Sweep file and resolved configurations",
        (pre_html(sweep_file.read_text(), "sweep-file") if sweep_file.is_file() else
         "<p>The sweep file (_sweep.toml) is missing.</p>")
        + "<p>Each run's fully resolved configuration (<code>dwell run run.toml -o DIR</code> "
        "repeats it):</p>" + "".join(configs) + more))
    facts = [("folder", str(out)), ("sweep", _sweep_name(out)),
             ("finished runs", n_runs), ("failed runs", len(failed)),
             ("terminals", ", ".join(terms[:20]) + (", ..." if len(terms) > 20 else "")),
             ("policies", ", ".join(dict.fromkeys(df["policy"].astype(str))))]
    page = page_html(f"dwell sweep report: {_sweep_name(out)}", facts, sections)
    target = Path(output) if output is not None else out / SWEEP_REPORT_NAME
    write_text(target, page)
    return target
