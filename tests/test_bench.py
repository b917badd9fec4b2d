"""Smoke test of the benchmark harness: `dwell bench --quick` runs and reports every case.

Speed is measured by the benchmark itself, never asserted here (DEVELOPERS.md).  What is
checked is that each case ran (no error row), that the accuracy and equality checks the
benchmark carries hold on the small cases (every rise/set within 0.5 s of the reference
library's, as the benchmark issue requires; the event kernel's handovers identical to the naive
kernel's), and that the results files are written.
"""

from __future__ import annotations

import json

from click.testing import CliRunner

from dwell.cli import main


def test_bench_quick_runs(tmp_path):
    out = tmp_path / "bench"
    result = CliRunner().invoke(main, ["bench", "--quick", "-o", str(out)])
    assert result.exit_code == 0, result.output
    data = json.loads((out / "bench.json").read_text())
    cases = data["cases"]
    assert cases and not any("error" in c and isinstance(c["error"], str) for c in cases), cases
    by_name = {c["case"]: c for c in cases}
    one = by_name["passes-1-terminal"]
    # benchmark issue, target 1: every rise/set within 0.5 s of skyfield's find_events, whose
    # own times are good to 0.5 s (it returns the end of a half-second bracket)
    assert one["max_event_diff_s"] < 0.5 and one["unmatched_events"] == 0
    kernel = [c for c in cases if c["case"].startswith("kernel-")]
    assert kernel and all(c["same_handovers"] for c in kernel)
    assert (out / "bench.parquet").is_file()
    assert "growth exponents" in result.output
