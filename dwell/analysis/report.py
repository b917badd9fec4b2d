"""``dwell report``: one self-contained HTML page per run folder (the sweep page is built from
the same parts in :mod:`dwell.sweep.report`).

The page holds its figures as base64 PNG, its tables as HTML tables and the resolved
configuration as text; it loads nothing (no external address, script, style sheet or font),
so it reads offline and can be mailed as one file.  It is written atomically.

``plot_run`` (``dwell plot`` of a run folder) lives in :mod:`dwell.analysis.figures` and is
importable from here as before.
"""

from __future__ import annotations

import base64
import html
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from .. import __version__
from ..io.atomic import write_text
from .figures import Rendered, check_choice, plot_run, render_run
from .plots import policies_of, terminals_of

__all__ = ["CAUTIONS", "Section", "figure_html", "page_html", "plot_run", "report_run",
           "table_html"]

REPORT_NAME = "report.html"

# From the README: what the numbers are for, and how to read their intervals.
CAUTIONS = (
    "dwell informs engineering studies. It is no substitute for regulatory, licensing or "
    "safety-of-life link analysis; where those apply, they decide.",
    "Intervals are 95 %: exact Poisson intervals on handover, ping-pong and failure counts "
    "(handovers are not exactly Poisson, so read them as indicative) and hour-bootstrap "
    "intervals on the mean dwell and the outage fraction. They cover sampling within this "
    "scenario only, not the modelling choices.",
    "The plain link-budget defaults are illustrative; the results are as good as the "
    "constellation, site, link and policy descriptions in the configuration below.",
)

_STYLE = """
body { font-family: sans-serif; margin: 1.5em auto; max-width: 1400px; padding: 0 1em;
       color: #222; line-height: 1.35; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.2em; border-bottom: 1px solid #ccc; margin-top: 1.6em; }
h3 { font-size: 1.05em; }
.caution { border: 1px solid #c90; background: #fff8e6; padding: 0.6em 1em; }
.caution p { margin: 0.3em 0; }
dl.facts { display: grid; grid-template-columns: max-content auto; gap: 0.15em 1em; }
dl.facts dt { font-weight: bold; }
dl.facts dd { margin: 0; }
.wide { overflow-x: auto; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.5em 0; }
th, td { border: 1px solid #ccc; padding: 0.2em 0.5em; text-align: right; white-space: nowrap; }
th { background: #f0f0f0; }
td.text, th.text { text-align: left; }
td.wrap { white-space: normal; min-width: 24em; text-align: left; }
caption { text-align: left; font-weight: bold; padding: 0.3em 0; }
figure { margin: 1em 0 2em 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #444; }
pre { background: #f6f6f6; border: 1px solid #ddd; padding: 0.6em; overflow-x: auto;
      font-size: 0.8em; }
"""


@dataclass
class Section:
    """One part of the page: an id (anchor), a heading and its HTML body."""
    anchor: str
    heading: str
    body: str


def esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


def fmt(value: Any, digits: int = 4) -> str:
    """A table cell: floats to ``digits`` significant digits, NaN as a dash, booleans as
    yes/no, timestamps in ISO form."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if v == 0:
            return "0"
        return f"{v:.{digits}g}" if 1e-4 <= abs(v) < 1e6 else f"{v:.{digits - 1}e}"
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return str(value)


def with_interval(value: float, lo: float, hi: float, scale: float = 1.0) -> str:
    """``value [lo, hi]`` (the interval only where it is known)."""
    v = fmt(value * scale)
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return v
    return f"{v} [{fmt(lo * scale)}, {fmt(hi * scale)}]"


Cell = Callable[[pd.Series], str]


def table_html(df: pd.DataFrame, columns: dict[str, str | Cell], anchor: str, caption: str,
               text_columns: tuple[str, ...] = (), wrap_columns: tuple[str, ...] = ()) -> str:
    """An HTML table with ``id=anchor``: ``columns`` maps each header to a column name or to a
    function of the row giving the cell's text; text columns align left, wrap columns also
    break lines.  Cost: O(rows x columns)."""
    left = text_columns + wrap_columns
    heads = "".join(f'<th class="{"text" if h in left else "num"}">{esc(h)}</th>' for h in columns)
    rows = []
    for _, r in df.iterrows():
        cells = []
        for head, col in columns.items():
            text = col(r) if callable(col) else fmt(r[col])
            cls = "wrap" if head in wrap_columns else "text" if head in text_columns else "num"
            cells.append(f'<td class="{cls}">{esc(text)}</td>')
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return (f'<div class="wide"><table id="{esc(anchor)}"><caption>{esc(caption)}</caption>'
            f"<thead><tr>{heads}</tr></thead><tbody>{''.join(rows)}</tbody></table></div>")


def all_columns_html(df: pd.DataFrame, anchor: str, caption: str) -> str:
    """Every column of a table, collapsed under a summary line."""
    text = tuple(c for c in df.columns if not pd.api.types.is_numeric_dtype(df[c]))
    body = table_html(df, {c: c for c in df.columns}, anchor, caption, text_columns=text)
    return f"<details><summary>{esc(caption)}</summary>{body}</details>"


def figure_html(fig: Rendered) -> str:
    """A figure as an embedded PNG (``data:`` address) with its caption."""
    data = base64.b64encode(fig.png).decode("ascii")
    stem = fig.name.rsplit(".", 1)[0]
    return (f'<figure id="fig-{esc(stem)}"><img src="data:image/png;base64,{data}" '
            f'alt="{esc(fig.caption)}" data-name="{esc(fig.name)}">'
            f"<figcaption>{esc(fig.caption)} ({esc(fig.name)})</figcaption></figure>")


def pre_html(text: str, anchor: str) -> str:
    return f'<pre id="{esc(anchor)}">{esc(text)}</pre>'


def facts_html(facts: list[tuple[str, Any]]) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(fmt(v))}</dd>"
                                          for k, v in facts) + "</dl>"


def cautions_html() -> str:
    return '<div class="caution">' + "".join(f"<p>{esc(c)}</p>" for c in CAUTIONS) + "</div>"


def page_html(title: str, facts: list[tuple[str, Any]], sections: list[Section]) -> str:
    """The whole page: title, facts, cautions, a contents list and the sections."""
    toc = "".join(f'<li><a href="#{esc(s.anchor)}">{esc(s.heading)}</a></li>' for s in sections)
    body = "".join(f'<section id="{esc(s.anchor)}"><h2>{esc(s.heading)}</h2>{s.body}</section>'
                   for s in sections)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{esc(title)}</title><style>{_STYLE}</style></head><body>"
            f"<h1>{esc(title)}</h1>{facts_html(facts)}"
            f'<section id="cautions"><h2>Read this first</h2>{cautions_html()}</section>'
            f"<nav><h2>Contents</h2><ul>{toc}</ul></nav>{body}"
            f"<p><small>Written by dwell {esc(__version__)}.</small></p></body></html>\n")


# ---- the run page ----------------------------------------------------------------------------

def summary_columns() -> dict[str, str | Cell]:
    """The summary columns the page shows first (every column is in the full table too)."""
    return {
        "terminal": "terminal",
        "policy": "policy",
        "handovers per hour [95 %]": lambda r: with_interval(
            r["handovers_per_hour"], r["handovers_per_hour_lo"], r["handovers_per_hour_hi"]),
        "worst hour": "worst_hour_handovers",
        "dwell mean s [95 %]": lambda r: with_interval(
            r["dwell_mean_s"], r["dwell_mean_lo_s"], r["dwell_mean_hi_s"]),
        "dwell median s": "dwell_median_s",
        "outage % [95 %]": lambda r: with_interval(
            r["outage_fraction"], r["outage_fraction_lo"], r["outage_fraction_hi"], 100.0),
        "ping-pongs per hour [95 %]": lambda r: with_interval(
            r["ping_pongs"] / r["duration_h"], r["ping_pong_per_hour_lo"],
            r["ping_pong_per_hour_hi"]),
        "radio link failures": "radio_link_failures",
        "slew mean deg": "slew_mean_deg",
        "slew p95 deg": "slew_p95_deg",
        "switching s": "switching_s",
        "apertures for make-before-break": "mbb_apertures_needed",
    }


def comparison_columns() -> dict[str, str | Cell]:
    return {
        "terminal": "terminal", "policy": "policy", "quantity": "quantity",
        "simulated [95 %]": lambda r: with_interval(r["simulated"], r["sim_lo"], r["sim_hi"]),
        "analytic": "analytic",
        "relative difference": lambda r: "–" if not np.isfinite(r["rel_diff"])
        else f"{100 * r['rel_diff']:+.2f} %",
        "analytic inside interval": "inside_interval",
        "note": "note",
    }


def area_columns() -> dict[str, str | Cell]:
    """The ``areas`` table as the page shows it: weighted means with the smallest and largest
    terminal's value."""
    def spread(col: str, scale: float = 1.0) -> Cell:
        return lambda r: (f"{fmt(r[f'{col}_mean'] * scale)} [{fmt(r[f'{col}_min'] * scale)}, "
                          f"{fmt(r[f'{col}_max'] * scale)}]")
    return {"area": "area", "policy": "policy", "terminals": "terminals", "weight": "weight",
            "handovers per hour [min, max]": spread("handovers_per_hour"),
            "worst hour [min, max]": spread("worst_hour_handovers"),
            "outage % [min, max]": spread("outage_fraction", 100.0),
            "satellite changes per hour [min, max]": spread("satellite_changes_per_hour"),
            "mean in view [min, max]": spread("mean_in_view"),
            "dwell mean s [min, max]": spread("dwell_mean_s")}


def band_columns() -> dict[str, str | Cell]:
    """:func:`dwell.analysis.compare.area_bands` as the page shows it."""
    return {
        "area": "area", "latitude band": "band", "terminals": "terminals", "policy": "policy",
        "quantity": "quantity", "simulated (mean)": "simulated", "analytic (mean)": "analytic",
        "relative difference": lambda r: "–" if not np.isfinite(r["rel_diff"])
        else f"{100 * r['rel_diff']:+.2f} %",
        "intervals holding the analytic value": "inside", "note": "note",
    }


def _terminal_list(names: list[str], generated: int) -> str:
    """The listed terminals by name and the generated ones by count (an area has thousands)."""
    listed = ", ".join(names)
    if not generated:
        return listed
    return (listed + "; " if listed else "") + f"{generated} generated by [[area]] tables"


def run_facts(run_dir: Path, scen, summary: pd.DataFrame) -> list[tuple[str, Any]]:
    from ..io.tables import read_metadata
    meta = read_metadata(run_dir / "summary.parquet")
    sc = scen.scenario
    pop = scen.population
    generated = set(scen.terminal_names()[pop.first_index:pop.first_index + len(pop)]) \
        if pop is not None else set()
    return [("folder", str(run_dir)), ("scenario", sc["name"]), ("start (UTC)", sc["start"]),
            ("duration", f"{float(sc['duration_s']) / 3600:g} h"),
            ("satellites", len(scen.constellation)),
            ("terminals", _terminal_list([t for t in terminals_of(summary)
                                          if t not in generated], len(generated))),
            ("policies", ", ".join(policies_of(summary))),
            ("seed", scen.seed), ("config sha256", meta.get("dwell.config_sha256", "–")),
            ("tables written by dwell", meta.get("dwell.version", "–"))]


def report_run(run_dir: str | Path, terminal: str | None = None, policy: str | None = None,
               hour: int | None = None, output: str | Path | None = None) -> Path:
    """Write the run folder's report page (default ``run_dir/report.html``) and return its
    path.  Options as for ``dwell plot``, checked first.  Cost: drawing every figure (a few
    seconds) plus the analytic comparison."""
    from ..io.config import load_scenario
    from .compare import area_bands, compare_run, places_of

    run_dir = Path(run_dir)
    choice = check_choice(run_dir, terminal, policy, hour)
    scen = load_scenario(run_dir / "run.toml")
    summary = pd.read_parquet(run_dir / "summary.parquet")
    comparison = compare_run(run_dir)
    figures = render_run(run_dir, choice, comparison=comparison)
    # an area's terminals appear through its means and latitude bands, not one row each
    places = places_of(run_dir)
    generated = set() if places is None else set(places["terminal"].astype(str))
    own = summary[~summary["terminal"].astype(str).isin(generated)]
    own_cmp = comparison[~comparison["terminal"].astype(str).isin(generated)]
    areas_html = ""
    if generated and (run_dir / "areas.parquet").is_file():
        areas_html = table_html(pd.read_parquet(run_dir / "areas.parquet"), area_columns(),
                                "areas-table", "Each area's terminals: weighted means, with "
                                "the smallest and largest terminal's value (every terminal's "
                                "row is in map.parquet and summary.parquet)",
                                ("area", "policy"))
    bands_html = "" if not generated else table_html(
        area_bands(comparison, places), band_columns(), "bands-table",
        "Each area's terminals by 1-degree latitude band (every terminal's row is in "
        "comparison.parquet after dwell compare)",
        ("area", "latitude band", "policy", "quantity", "intervals holding the analytic value"),
        wrap_columns=("note",))
    sections = [
        Section("summary", "Summary per terminal and policy",
                (table_html(own, summary_columns(), "summary-table",
                            "Main results (95 % intervals in brackets)", ("terminal", "policy"))
                 if len(own) else "") + areas_html
                + (all_columns_html(own, "summary-full", "Every summary column")
                   if len(own) else "")),
        Section("comparison", "Simulated against analytic",
                (table_html(own_cmp, comparison_columns(), "comparison-table",
                            "Closed-form checks where their assumptions hold",
                            ("terminal", "policy", "quantity", "analytic inside interval"),
                            wrap_columns=("note",)) if len(own_cmp) or not generated else "")
                + bands_html),
        Section("figures", "Figures", "".join(figure_html(f) for f in figures)),
        Section("configuration", "Resolved configuration (run.toml)",
                "<p>The run repeats exactly with <code>dwell run run.toml -o DIR</code>.</p>"
                + pre_html((run_dir / "run.toml").read_text(), "configuration-text")),
    ]
    page = page_html(f"dwell run report: {scen.scenario['name']}",
                     run_facts(run_dir, scen, summary), sections)
    target = Path(output) if output is not None else run_dir / REPORT_NAME
    write_text(target, page)
    return target
