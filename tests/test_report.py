"""`dwell report` and `dwell plot` of a run folder (issue 16).

What is checked, and against what:

- the report is one self-contained HTML page (issue 16: "figures embedded, summary and
  comparison tables, the resolved configuration, the cautions from the README, readable
  offline"): parsed with the standard library's html.parser; every figure is a PNG by the PNG
  specification's signature and IHDR header inside an RFC 2397 data URL; the summary table
  has one row per terminal x policy of the configuration file; the configuration block is the
  folder's run.toml verbatim; the README's caution sentence is on the page;
- a real browser (headless Chromium from Debian's packages) loads it with no broken image and
  renders a screenshot of the requested size that is not blank;
- the figures' titles, axis labels and legends do not overlap (their drawn boxes);
- plot options that name nothing in the run are one line, exit status 2, nothing overwritten
  (README: "Bad input prints one line naming the file, the key (or line) and the value, exits
  with status 2, and writes nothing");
- per-hour series and switch intervals on hand-built tables, expected values worked by hand;
- the measurement trace figure on a small synthetic trace built here (issue 11's contract).

Cost: one 2-hour run of configs/quick.toml (about 2 s), a few renders (about 10 s each), and
Chromium three times (a few seconds each).
"""

from __future__ import annotations

import re
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from dwell.analysis import figures as figures_mod
from dwell.analysis.hourly import hourly_series, switch_intervals
from dwell.analysis.plots import mask_figure, plt, png_bytes
from dwell.analysis.time_plots import trace_figure
from dwell.cli import main
from report_checks import (Page, assert_self_contained, chromium, chromium_or_skip, image_bytes,
                           png_size, text_overlaps)

ROOT = Path(__file__).resolve().parents[1]
QUICK = ROOT / "configs" / "quick.toml"
HOURS = 2
RUN_FIGURES = {"dwell_ccdf", "rates", "in_view", "hourly", "switch_intervals", "slew",
               "timeline", "sky", "load"}     # load: every run with handovers (issue 15)


def _dwell(*args: str):
    return CliRunner().invoke(main, list(args))


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("report-run")
    cfg = folder / "quick2h.toml"
    cfg.write_text(QUICK.read_text().replace("duration_s = 21600", f"duration_s = {HOURS * 3600}"))
    res = _dwell("run", str(cfg), "-o", str(folder / "run"), "--workers", "1")
    assert res.exit_code == 0, res.output
    return folder / "run"


def _config_names() -> tuple[list[str], list[str]]:
    """Terminals and policies as the configuration file lists them (not our output)."""
    cfg = tomllib.loads(QUICK.read_text())
    return [t["name"] for t in cfg["terminal"]], [p["name"] for p in cfg["policy"]]


def _synthetic_trace(terminal: str, policy: str, start: pd.Timestamp) -> pd.DataFrame:
    """Three cells measured every second for ten minutes of hour 0; the serving cell is A for
    the first 200 s, B for the next 200 s and C after; rows follow issue 11's trace contract."""
    t = np.arange(0, 600, 1.0)
    rows = []
    serving = np.where(t < 200, "A", np.where(t < 400, "B", "C"))
    for k, cell in enumerate("ABC"):
        rsrp = -100.0 - 0.0001 * (t - 200.0 * k - 100.0) ** 2      # each cell peaks in its turn
        rows.append(pd.DataFrame({
            "policy": policy, "time_utc": start + pd.to_timedelta(t, unit="s"),
            "terminal": terminal, "cell": f"sat-{k // 2}/{cell}", "satellite": f"sat-{k // 2}",
            "beam": k, "rsrp_dbm": rsrp, "rsrp_raw_dbm": rsrp + np.sin(t), "sinr_db": rsrp + 110.0,
            "serving": serving == cell}))
    return pd.concat(rows, ignore_index=True)


# ---- the report page -------------------------------------------------------------------------

@pytest.fixture(scope="module")
def report(run_dir, tmp_path_factory) -> tuple[Path, Page]:
    """A copy of the run folder with a synthetic trace, and its report page."""
    folder = tmp_path_factory.mktemp("report-page") / "run"
    shutil.copytree(run_dir, folder)
    terms, pols = _config_names()
    start = pd.Timestamp(tomllib.loads(QUICK.read_text())["scenario"]["start"])
    _synthetic_trace(terms[-1], pols[0], start).to_parquet(folder / "trace.parquet")
    res = _dwell("report", str(folder))
    assert res.exit_code == 0, res.output
    html_file = folder / "report.html"
    return html_file, Page(html_file.read_text(encoding="utf-8"))


def test_report_holds_every_figure_as_an_embedded_png(report):
    _, page = report
    names = {img.get("data-name", "").removesuffix(".png") for img in page.images}
    # every run figure, plus the trace figure because the folder holds trace.parquet
    assert names == RUN_FIGURES | {"trace"}
    assert {f.removeprefix("fig-") for f in page.figures} == names
    for img in page.images:
        width, height = png_size(image_bytes(img))      # a real PNG (PNG spec signature, IHDR)
        assert width > 300 and height > 200, (img["data-name"], width, height)
        assert img.get("alt"), img["data-name"]


def test_report_holds_the_tables_the_configuration_and_the_cautions(report):
    html_file, page = report
    terms, pols = _config_names()
    assert page.tables["summary-table"] == len(terms) * len(pols)
    assert page.tables["summary-full"] == len(terms) * len(pols)
    assert page.tables["comparison-table"] >= len(terms)   # at least one quantity per terminal
    run_toml = (html_file.parent / "run.toml").read_text()
    assert page.pre["configuration-text"] == run_toml
    readme = " ".join((ROOT / "README.md").read_text().split())
    caution = re.search(r"\*\*(dwell informs engineering studies\..*?)\*\*", readme).group(1)
    assert caution in page.visible_text
    for name in terms + pols:
        assert name in page.visible_text


def test_report_loads_nothing_from_elsewhere(report):
    _, page = report
    assert_self_contained(page)


def test_report_is_written_atomically(report):
    html_file, _ = report
    # dwell/io/atomic.py writes ".<name>.<random>.tmp" beside the target and renames it
    assert not [p.name for p in html_file.parent.iterdir() if p.name.startswith(".report.html")]


def test_report_renders_in_a_real_browser(report, tmp_path):
    path = chromium_or_skip()
    html_file, page = report
    n_images = len(page.images)
    # The page carries no script; for the check a copy gets one that, once the load event has
    # fired (every image fetched and decoded, or failed), counts the images whose natural width
    # is 0 -- what a browser reports for an image it could not load -- and puts the counts in
    # the title.  --dump-dom prints the DOM after load, so the title is read back from stdout.
    probe = ("<script>window.addEventListener('load', function () {"
             "var n = document.images.length, bad = 0;"
             "for (var i = 0; i < n; i++) { var im = document.images[i];"
             " if (!im.complete || im.naturalWidth === 0) bad++; }"
             "document.title = 'images=' + n + ' broken=' + bad; });</script>")
    text = html_file.read_text(encoding="utf-8")
    probed = tmp_path / "probe.html"
    probed.write_text(text.replace("</body>", probe + "</body>"), encoding="utf-8")
    dom = chromium(path, tmp_path / "profile", "--dump-dom", probed.as_uri())
    assert f"<title>images={n_images} broken=0</title>" in dom, dom[:300]
    # the probe must see a broken image when there is one (so the check above can fail)
    first = page.images[0]["src"]
    broken = tmp_path / "broken.html"
    broken.write_text(text.replace(first, "data:image/png;base64,AAAA", 1)
                      .replace("</body>", probe + "</body>"), encoding="utf-8")
    dom = chromium(path, tmp_path / "profile", "--dump-dom", broken.as_uri())
    assert f"<title>images={n_images} broken=1</title>" in dom, dom[:300]
    # a screenshot of the requested size, and not a blank page
    shot = tmp_path / "shot.png"
    chromium(path, tmp_path / "profile", f"--screenshot={shot}", "--window-size=1280,2400",
             html_file.as_uri())
    data = shot.read_bytes()
    assert png_size(data) == (1280, 2400)
    pixels = plt.imread(shot)[..., :3]
    ink = np.mean(pixels.min(axis=2) < 0.8)   # share of pixels clearly darker than white
    # text, table rules and the first figures cover well over 1 % of a report's first screens;
    # a blank or unstyled failure page covers almost none
    assert ink > 0.01, ink


# ---- what the figures show -------------------------------------------------------------------

def test_run_figures_have_no_overlapping_titles_labels_or_legends(run_dir):
    choice = figures_mod.check_choice(run_dir, None, None, None)
    problems = {}

    def check(fig):
        bad = text_overlaps(fig)
        if bad:
            problems[fig.get_suptitle() or fig.axes[0].get_title()] = bad
        return png_bytes(fig)

    figures_mod.render_run(run_dir, choice, finish=check)
    assert not problems, problems


def test_overlap_check_finds_the_old_mask_title_clash():
    # the mask figure's layout before issue 16 (suptitle raised to y=1.04 over a polar title
    # padded by 18 points): the check must report it, or passing it would mean nothing
    fig = plt.figure(figsize=(11, 4.5))
    polar = fig.add_subplot(1, 2, 1, projection="polar")
    polar.set_title("sky view (elevation rings, deg)", pad=18)
    fig.add_subplot(1, 2, 2)
    fig.suptitle("tannery-row: elevation mask", y=1.04)
    assert ("suptitle", "axes 0 title") in text_overlaps(fig)
    plt.close(fig)


def test_mask_figure_titles_do_not_overlap():
    az = np.arange(0.0, 360.0, 1.0)
    el = 20 + 15 * np.sin(np.radians(3 * az))
    fig = mask_figure(az, el, 10.0, "some-site: elevation mask")
    assert text_overlaps(fig) == []
    plt.close(fig)


def test_hourly_series_counts_and_splits_by_clock_hour():
    start = pd.Timestamp("2027-01-01T00:00:00Z")
    at = lambda s: start + pd.to_timedelta(s, unit="s")  # noqa: E731
    # handovers at 10 s, 3599 s, 3600 s and 7300 s; hours are half-open [k h, (k+1) h)
    ho = pd.DataFrame({"terminal": "t", "policy": "p",
                       "time_utc": at([10.0, 3599.0, 3600.0, 7300.0])})
    # an obstruction outage across the first hour boundary, and a 2 s switching gap in hour 2
    out = pd.DataFrame({"terminal": "t", "policy": "p",
                        "start_utc": at([3500.0, 7250.0]), "end_utc": at([3700.0, 7252.0]),
                        "cause": ["obstruction", "switching"]})
    got = hourly_series(ho, out, 7500.0, start, [("t", "p")])
    # worked by hand: hour 0 [0, 3600) holds 10 s and 3599 s; hour 1 holds 3600 s; hour 2,
    # cut at 7500 s, holds 7300 s; the outage gives 100 s to each of hours 0 and 1
    assert got["handovers"].tolist() == [2, 1, 1]
    assert got["outage_s"].tolist() == pytest.approx([100.0, 100.0, 0.0], abs=1e-6)
    assert got["switching_s"].tolist() == pytest.approx([0.0, 0.0, 2.0], abs=1e-6)
    assert got["hour_s"].tolist() == [3600.0, 3600.0, 300.0]
    # time from handover to handover, by hand: 3589, 1, 3700 s
    gaps = switch_intervals(ho, start)
    assert gaps["interval_s"].tolist() == pytest.approx([3589.0, 1.0, 3700.0])


def test_trace_figure_draws_one_hour_with_serving_cell_and_handovers():
    start = pd.Timestamp("2027-05-10T00:00:00Z")
    trace = _synthetic_trace("site-a", "rule-a", start)
    ho = pd.DataFrame({"terminal": "site-a", "policy": "rule-a",
                       "time_utc": start + pd.to_timedelta([200.0, 400.0, 4000.0], unit="s")})
    fig = trace_figure(trace, ho, "site-a", "rule-a", 0, start)
    rsrp_ax, sinr_ax = fig.axes[:2]
    assert "3 cells measured" in rsrp_ax.get_title()
    assert rsrp_ax.get_ylabel() == "RSRP (dBm)" and sinr_ax.get_ylabel() == "serving SINR (dB)"
    lines = [c for c in rsrp_ax.collections if len(c.get_segments())]
    cells, serving, marks = lines[0], lines[1], lines[2]
    # every cell's 600 samples joined by 599 pieces; the serving cell's 600 samples by 597
    # (one break at each of the two changes of cell)
    assert len(cells.get_segments()) == 3 * 599
    assert len(serving.get_segments()) == 597
    assert len({tuple(c) for c in serving.get_colors()}) == 2       # colour changes with the cell
    # handover lines at 200 s and 400 s = 3.33 and 6.67 minutes; the one at 4000 s is hour 1
    x = sorted(seg[0][0] for seg in marks.get_segments())
    assert x == pytest.approx([200 / 60, 400 / 60])
    assert text_overlaps(fig) == []
    plt.close(fig)


def test_report_without_a_trace_has_no_trace_figure(run_dir, tmp_path):
    out = tmp_path / "page.html"
    res = _dwell("report", str(run_dir), "-o", str(out))
    assert res.exit_code == 0, res.output
    names = {img.get("data-name") for img in Page(out.read_text()).images}
    assert names == {f"{n}.png" for n in RUN_FIGURES}
    assert not (run_dir / "report.html").exists()        # -o: written there only


# ---- options checked before anything is drawn ------------------------------------------------

def _snapshot(folder: Path) -> dict[str, tuple[int, bytes]]:
    return {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in sorted(folder.iterdir())
            if p.is_file()}


@pytest.mark.parametrize("args, option, value", [
    (["--terminal", "nobody"], "--terminal", "nobody"),
    (["--policy", "nobody"], "--policy", "nobody"),
    (["--hour", str(HOURS)], "--hour", str(HOURS)),            # hours are 0 .. HOURS - 1
    (["--hour", "999"], "--hour", "999"),
    (["--hour", "-1"], "--hour", "-1"),
    (["--terminal", "x" * 1_000_000], "--terminal", "xxx"),    # a 1 MB name: still one line
])
@pytest.mark.parametrize("command", ["plot", "report"])
def test_bad_plot_option_is_one_line_exit_2_and_overwrites_nothing(run_dir, command, args, option,
                                                                   value):
    if not (run_dir / "plots").exists():
        assert _dwell("plot", str(run_dir)).exit_code == 0
    before = _snapshot(run_dir / "plots")
    top = _snapshot(run_dir)
    res = _dwell(command, str(run_dir), *args)
    assert res.exit_code == 2, res.output
    line = res.stderr.strip()
    assert "\n" not in line and len(line) < 400, line[:400]
    assert str(run_dir) in line and option in line and value in line
    assert _snapshot(run_dir / "plots") == before
    assert _snapshot(run_dir) == top                      # no report.html either
