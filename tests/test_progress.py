"""Progress bars (issue 16, item 5): rate and time left from tqdm, silent off a terminal.

The reference is tqdm's own documented output format (a maintained library: the rate is
units per second, "left" is its remaining-time estimate); these check that our one interface
drives it, not tqdm's arithmetic.
"""

from __future__ import annotations

import io
from pathlib import Path

from click.testing import CliRunner

from dwell.cli import main
from dwell.progress import Progress


class _Terminal(io.StringIO):
    def isatty(self) -> bool:   # a stream that says it is a terminal
        return True


def test_bar_shows_position_rate_and_time_left_on_a_terminal():
    out = _Terminal()
    with Progress("simulating", "h", scale=1 / 3600, decimals=1, stream=out) as bar:
        bar.to(1800.0, 7200.0)
        bar.to(7200.0, 7200.0, note="done")
    text = out.getvalue()
    assert "simulating" in text and "2.0/2.0 h" in text   # 7200 s shown as 2.0 h
    assert "left" in text and "h/s" in text               # time left and rate (tqdm's rate_fmt)
    assert "done" in text


def test_bar_is_silent_when_the_stream_is_not_a_terminal():
    out = io.StringIO()                                    # StringIO.isatty() is False
    with Progress("sweep", "runs", 4, stream=out) as bar:
        for k in range(5):
            bar.to(k, 4, note=f"{k} failed")
    assert out.getvalue() == ""


def test_run_prints_no_progress_when_stderr_is_not_a_terminal(tmp_path):
    # README: progress is for people at a terminal; a pipe or log gets only the results
    cfg = tmp_path / "tiny.toml"
    quick = Path(__file__).resolve().parents[1] / "configs" / "quick.toml"
    cfg.write_text(quick.read_text().replace("duration_s = 21600", "duration_s = 600"))
    res = CliRunner().invoke(main, ["run", str(cfg), "-o", str(tmp_path / "out"),
                                    "--workers", "2"])
    assert res.exit_code == 0, res.output
    assert "simulating" not in res.stderr and "%|" not in res.stderr


def test_writing_a_run_folder_reports_each_table_and_ends_at_the_total(tmp_path):
    # the long last step of a large run (issue 15): the folder is written a table at a time
    # and the bar follows it; the contract is the callback, checked on both write paths
    from dwell.io.config import load_scenario
    from dwell.run import STREAMED, execute

    quick = Path(__file__).resolve().parents[1] / "configs" / "quick.toml"
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(quick.read_text().replace("duration_s = 21600", "duration_s = 600"))
    for workers in (1, 2):                       # in memory; parts from two processes
        seen: list[tuple[float, float, str]] = []
        execute(load_scenario(cfg), tmp_path / f"out{workers}", workers=workers,
                writing=lambda done, total, name: seen.append((done, total, name)))
        names = [n for _, _, n in seen]
        assert set(STREAMED) <= set(names) and "load" in names
        assert [d for d, _, _ in seen] == sorted(d for d, _, _ in seen)   # never backwards
        assert seen[-1][0] == seen[-1][1]                                   # ends complete
