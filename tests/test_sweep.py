"""Sweeps: resumable after a hard kill, the same on a dask cluster, faithful to single runs.

The contract (README, "dwell sweep SWEEP.toml -o DIR  # parameter grids over many runs,
resumable"; dwell/sweep/execute.py: "every file and folder is written under a temporary name
and renamed into place, so an interrupted sweep leaves nothing half-written and a restart skips
exactly the finished runs"; a failed run's error goes to ``DIR/_failed/``):

1. a sweep killed with SIGKILL part-way (worker processes included) leaves only complete files
   visible, and resumed gives the same combined summary as an uninterrupted sweep, with no run
   done twice;
2. the dask executor on a local cluster writes the same summaries as local processes;
3. each run's row in the combined summary equals what ``dwell run`` of that run's own
   ``run.toml`` gives (runs that share a task share geometry and noise, and must not notice);
4. ``--dry-run`` counts the runs of the grid (product of the axis lengths) and writes nothing;
5. a run whose plug-in policy raises is recorded in ``DIR/_failed/`` and the sweep goes on.

The reference everywhere is the program's own uninterrupted, single-run or local behaviour:
these are consistency properties stated by the README, not numeric results.

Cost: three small sweeps on ``configs/quick.toml`` cut to two hours (4 seeds x 2 policies =
8 runs in 4 tasks, about 1 s of work per task: long enough to be killed part-way), one of half
that on a dask local cluster, two single runs and a 10-minute sweep run twice; about 25 s on
two cores.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import pandas as pd
import pytest
import tomli_w
from click.testing import CliRunner

from dwell.cli import main
from dwell.sweep import combined_summary, load_sweep, pending

QUICK = Path(__file__).resolve().parents[1] / "configs" / "quick.toml"
SEEDS = [1, 2, 3, 4]
POLICIES = ["a3", "highest-elevation"]
RUN_TABLES = ("links", "handovers", "outages", "dwell_ccdf", "sinr_ccdf", "summary")


def _sweep_file(folder: Path, seeds=SEEDS, duration_s: float = 7200, name: str = "sweep.toml"
                ) -> Path:
    path = folder / name
    path.write_text(tomli_w.dumps({
        "sweep": {"base": str(QUICK), "name": "resume"},
        "overrides": {"scenario.duration_s": duration_s},
        "axis": [{"key": "scenario.seed", "values": list(seeds)},
                 {"key": "policy", "values": POLICIES}],
    }))
    return path


def _dwell(*args: str, check: bool = True) -> subprocess.CompletedProcess:
    proc = subprocess.run([sys.executable, "-m", "dwell.cli", *args], capture_output=True,
                          text=True, timeout=600)
    if check:
        assert proc.returncode == 0, proc.stderr
    return proc


def _report(stdout: str) -> dict[str, int]:
    m = re.search(r"done (\d+), failed (\d+), skipped (\d+) .*of (\d+) runs", stdout)
    assert m, stdout
    return dict(zip(("done", "failed", "skipped", "total"), map(int, m.groups())))


def _visible_files(out: Path) -> list[str]:
    """What a Parquet dataset reader (and a user) sees: names not starting with '_' or '.'."""
    return sorted(p.name for p in out.iterdir() if not p.name.startswith(("_", ".")))


def _assert_nothing_half_written(out: Path) -> None:
    visible = _visible_files(out)
    assert all(re.fullmatch(r"summary-[0-9a-f]{16}\.parquet", n) for n in visible), visible
    for name in visible:                      # every visible summary reads whole
        assert len(pd.read_parquet(out / name)) > 0
    runs = out / "_runs"
    for d in (runs.iterdir() if runs.exists() else []):
        if not d.name.startswith("."):        # a finished run folder holds all of its tables
            assert sorted(p.name for p in d.iterdir()) == sorted(
                [f"{t}.parquet" for t in RUN_TABLES] + ["run.toml"]), d


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> tuple[Path, Path]:
    """An uninterrupted two-worker sweep: (sweep file, output folder)."""
    folder = tmp_path_factory.mktemp("sweep-ref")
    sweep = _sweep_file(folder)
    out = folder / "out"
    rep = _report(_dwell("sweep", str(sweep), "-o", str(out), "--workers", "2").stdout)
    assert rep == {"done": 8, "failed": 0, "skipped": 0, "total": 8}
    return sweep, out


# ---- 1. killed and resumed --------------------------------------------------------------------

def test_killed_sweep_resumes_to_the_same_summary(reference, tmp_path):
    _, out_ref = reference
    sweep = _sweep_file(tmp_path)
    out = tmp_path / "out"
    plan = load_sweep(sweep)
    # a process group of its own, so the kill reaches the pool's workers too (a power cut)
    proc = subprocess.Popen([sys.executable, "-m", "dwell.cli", "sweep", str(sweep), "-o", str(out),
                             "--workers", "2"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while not (out.exists() and any(out.glob("summary-*.parquet"))):
            assert proc.poll() is None, "sweep ended before it could be interrupted"
            assert time.monotonic() < deadline, "no run finished within 120 s"
            time.sleep(0.01)
    finally:  # kill the group we started (by its id) whatever happened above
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL

    finished = len(list(out.glob("summary-*.parquet")))
    left = sum(len(v) for v in pending(plan, out).values())
    assert finished >= 1 and left >= 1, (finished, left)  # really interrupted part-way
    assert finished + left == len(plan.runs) == 8
    _assert_nothing_half_written(out)

    rep = _report(_dwell("sweep", str(sweep), "-o", str(out), "--workers", "2").stdout)
    # execute.py: a restart skips exactly the finished runs and does each of the others once
    assert rep == {"done": left, "failed": 0, "skipped": finished, "total": 8}
    _assert_nothing_half_written(out)

    got, want = combined_summary(out), combined_summary(out_ref)
    assert len(list(out.glob("summary-*.parquet"))) == 8
    assert got["run_key"].nunique() == 8 and set(got["run_key"]) == {r.key for r in plan.runs}
    # no duplicated run: one row per (run, terminal, policy); quick.toml has two terminals
    assert not got.duplicated(["run_key", "terminal", "policy"]).any() and len(got) == 8 * 2
    pd.testing.assert_frame_equal(got, want, check_exact=True)


# ---- 2. dask executor -------------------------------------------------------------------------

def test_dask_executor_matches_local(reference, tmp_path):
    pytest.importorskip("dask.distributed")
    _, out_ref = reference
    sweep = _sweep_file(tmp_path, seeds=SEEDS[:2])  # a subset of the reference's runs
    out = tmp_path / "out"
    rep = _report(_dwell("sweep", str(sweep), "-o", str(out), "--workers", "2",
                         "--executor", "dask").stdout)
    assert rep["done"] == 4 and rep["failed"] == 0
    got = combined_summary(out)
    want = combined_summary(out_ref)
    want = want[want["run_key"].isin(set(got["run_key"]))].reset_index(drop=True)
    assert len(want) == len(got) == 4 * 2
    # category order follows the set of files read, which differs here: compare values
    pd.testing.assert_frame_equal(got, want, check_exact=True, check_categorical=False)
    for f in out.glob("summary-*.parquet"):  # same bytes, provenance metadata included
        assert f.read_bytes() == (out_ref / f.name).read_bytes(), f.name


# ---- 3. combined summary vs single runs -------------------------------------------------------

def test_combined_summary_reproduces_single_runs(reference, tmp_path):
    _, out_ref = reference
    combined = combined_summary(out_ref)
    # two runs that share one task (same seed, the two policies): the harder case
    task = combined["task_key"].iloc[0]
    keys = sorted(combined.loc[combined["task_key"] == task, "run_key"].unique())
    assert len(keys) == 2
    for key in keys:
        single = tmp_path / key
        result = CliRunner().invoke(main, ["run", str(out_ref / "_runs" / key / "run.toml"),
                                           "-o", str(single)])
        assert result.exit_code == 0, result.output
        mine = pd.read_parquet(single / "summary.parquet")
        rows = combined[combined["run_key"] == key].reset_index(drop=True)
        rows = rows.sort_values(["terminal", "policy"]).reset_index(drop=True)
        mine = mine.sort_values(["terminal", "policy"]).reset_index(drop=True)
        assert rows["terminal"].astype(str).tolist() == mine["terminal"].astype(str).tolist()
        assert rows["policy"].astype(str).tolist() == mine["policy"].astype(str).tolist()
        numeric = [c for c in mine.columns if pd.api.types.is_numeric_dtype(mine[c])]
        assert len(numeric) > 10
        for col in numeric:  # exactly equal: same config, same seed, same arithmetic
            assert rows[col].tolist() == pytest.approx(mine[col].tolist(), rel=0, abs=0,
                                                       nan_ok=True), col
        # the per-run tables kept by the sweep agree with the single run's too
        for t in ("links", "handovers", "outages"):
            pd.testing.assert_frame_equal(
                pd.read_parquet(out_ref / "_runs" / key / f"{t}.parquet"),
                pd.read_parquet(single / f"{t}.parquet"), check_exact=True, check_categorical=False)


# ---- 4. dry run -------------------------------------------------------------------------------

def test_dry_run_counts_runs_and_writes_nothing(reference, tmp_path):
    sweep = _sweep_file(tmp_path)
    before = sorted(tmp_path.rglob("*"))
    result = CliRunner().invoke(main, ["sweep", str(sweep), "-o", str(tmp_path / "new"),
                                       "--dry-run"])
    assert result.exit_code == 0, result.output
    # a grid has the product of its axis lengths as runs (4 seeds x 2 policies); runs that
    # differ only in policy share a task (spec.py), so 4 tasks
    assert re.search(r"\b8 runs in 4 tasks \(8 not yet done\)", result.stdout), result.stdout
    assert sorted(tmp_path.rglob("*")) == before
    # on a finished sweep, nothing is left to do; the dry run still writes nothing
    sweep_ref, out_ref = reference
    listing = sorted(out_ref.rglob("*"))
    result = CliRunner().invoke(main, ["sweep", str(sweep_ref), "-o", str(out_ref), "--dry-run"])
    assert result.exit_code == 0 and "(0 not yet done)" in result.stdout, result.output
    assert sorted(out_ref.rglob("*")) == listing


# ---- 5. a failing run -------------------------------------------------------------------------

PLUGIN = '''
from dwell.policies.base import Policy


class Broken(Policy):
    """Loads and checks fine; fails as soon as it is asked for a decision."""

    rule = "broken"
    KEYS = {}

    def scan(self, rows, link):
        raise RuntimeError("deliberate failure in the plug-in")

    def step(self, rows, r, link):
        raise RuntimeError("deliberate failure in the plug-in")
'''


def _failing_sweep(folder: Path, rule: str) -> Path:
    (folder / "bad.py").write_text(PLUGIN)
    raw = tomllib.loads(QUICK.read_text())
    raw["scenario"]["duration_s"] = 600
    raw["policy"] = [{"name": "a3", "rule": "a3"}, {"name": "plug", "rule": rule}]
    (folder / "base.toml").write_text(tomli_w.dumps(raw))
    path = folder / "sweep.toml"
    # list mode: the plug-in runs alone in its task (seed 2), so the others can finish
    path.write_text(tomli_w.dumps({
        "sweep": {"base": "base.toml", "mode": "list"},
        "axis": [{"key": "scenario.seed", "values": [1, 2, 3]},
                 {"key": "policy", "values": ["a3", "plug"]}],
        "combination": [{"scenario.seed": 1, "policy": "a3"},
                        {"scenario.seed": 2, "policy": "plug"},
                        {"scenario.seed": 3, "policy": "a3"}],
    }))
    return path


def _check_failing_sweep(sweep: Path, out: Path) -> None:
    plan = load_sweep(sweep)
    bad = [r.key for r in plan.runs if r.policy_names == ["plug"]]
    proc = _dwell("sweep", str(sweep), "-o", str(out), "--workers", "1", check=False)
    assert proc.returncode == 1, proc.stderr  # issue 13 item 4: a failed run, a failed status
    assert _report(proc.stdout) == {"done": 2, "failed": 1, "skipped": 0, "total": 3}
    assert "deliberate failure in the plug-in" in proc.stderr
    assert sorted(p.name for p in (out / "_failed").iterdir()) == [f"{bad[0]}.json"]
    record = json.loads((out / "_failed" / f"{bad[0]}.json").read_text())
    assert "RuntimeError" in record["error"] and "deliberate" in record["error"]
    assert len(list(out.glob("summary-*.parquet"))) == 2
    assert not (out / f"summary-{bad[0]}.parquet").exists()
    # execute.py: a failed run is retried on the next start; finished ones are skipped
    again = _report(_dwell("sweep", str(sweep), "-o", str(out), "--workers", "1",
                           check=False).stdout)
    assert again == {"done": 0, "failed": 1, "skipped": 2, "total": 3}


def test_failing_run_is_recorded_and_the_sweep_goes_on(tmp_path):
    sweep = _failing_sweep(tmp_path, f"{tmp_path / 'bad.py'}:Broken")  # absolute: see below
    _check_failing_sweep(sweep, tmp_path / "out")


def test_failing_run_with_plugin_path_relative_to_config(tmp_path):
    assert Path.cwd() != tmp_path
    _check_failing_sweep(_failing_sweep(tmp_path, "bad.py:Broken"), tmp_path / "out")


def test_a_task_of_many_batches_writes_the_same_tables(tmp_path, monkeypatch):
    # A task of more terminals than one batch (an area) keeps its per-event tables in parts on
    # disk, not in memory (README, Areas: "memory does not grow with the population"); the
    # run folders it writes must not depend on that (the README's contract that the tables do
    # not depend on how the terminals are split).  Batches of one terminal force the parts.
    import dwell.run
    from dwell.sweep.execute import execute_sweep

    def files(folder: Path) -> dict[str, bytes]:
        return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
                if p.is_file() and p.suffix in (".parquet", ".toml") and p.name != "_sweep.toml"}

    plan = load_sweep(_sweep_file(tmp_path, seeds=[1], duration_s=1200))
    execute_sweep(plan, tmp_path / "whole")
    monkeypatch.setattr(dwell.run, "TERMINAL_BATCH", 1)
    execute_sweep(plan, tmp_path / "parts")
    whole, parts = files(tmp_path / "whole"), files(tmp_path / "parts")
    assert any(name.startswith("_runs") for name in whole)
    assert whole.keys() == parts.keys()
    assert [n for n in whole if whole[n] != parts[n]] == []


def test_scenario_warnings_are_said_once_naming_the_sweep_file_and_policy(tmp_path):
    # A sweep's runs share their base's warnings (here the default time-to-trigger, 0.32 s,
    # below the 1 s measurement period): each is said once, when the sweep is checked, naming
    # the sweep file and the policy by its name, not once per task with the task's internal
    # policy numbers (common practice: a warning names what the user wrote, once).
    base = tmp_path / "base.toml"
    base.write_text(tomli_w.dumps({
        "scenario": {"start": "2027-05-10T00:00:00Z", "duration_s": 600, "seed": 1},
        "constellation": [{"kind": "walker-delta", "name": "wren", "satellites": 300,
                           "planes": 20, "phasing": 1, "altitude_km": 560,
                           "inclination_deg": 53.5}],
        "terminal": [{"name": "mill-field", "lat_deg": 47.6, "lon_deg": 9.2,
                      "min_elevation_deg": 25}],
        "policy": [{"name": "eager", "rule": "a3"}, {"name": "calm", "rule": "a3",
                                                      "time_to_trigger_s": 1.28}]}))
    sweep = tmp_path / "seeds.toml"
    sweep.write_text(tomli_w.dumps({"sweep": {"base": str(base), "name": "seeds"},
                                    "axis": [{"key": "scenario.seed", "values": [1, 2, 3]}]}))
    proc = _dwell("sweep", str(sweep), "-o", str(tmp_path / "out"), "--workers", "2")
    ttt = [line for line in proc.stderr.splitlines() if "time_to_trigger_s" in line]
    assert len(ttt) == 1, proc.stderr
    assert ttt[0].startswith(f"warning: {sweep}") and 'policy "eager"' in ttt[0]
    assert "[task" not in proc.stderr and "sweep task" not in proc.stderr
