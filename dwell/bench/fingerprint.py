"""Fingerprints of what the engine computes, for checking that a speedup changed nothing.

``python -m dwell.bench.fingerprint [--demo]`` prints one hash per scenario: of the window
frames (every terminal's visibility windows and floor passes) and of every kernel record list
and SINR histogram of a run.  Run it before and after a change (a git worktree of the old
commit on ``PYTHONPATH`` gives the "before"); equal hashes mean bit-identical results.

Scenarios: the bench shell's noisy A3 day-part (two and eight invented sites), the NR
procedure, 19 earth-moving beams, co-channel interference, a weak link (radio link failures),
``configs/quick.toml`` and, with ``--demo``, ``configs/demo.toml`` (a few minutes).
"""

from __future__ import annotations

import hashlib
import sys
import time
from pathlib import Path
from typing import Callable

import pandas as pd

from .cases import A3_POLICY, scenario, shell, sites

NOISY = {"shadowing_std_db": 2.0, "measurement_noise_db": 1.0}
SPOT = {"preset": "s-band-leo600-handheld"}
CONFIGS = Path(__file__).resolve().parents[2] / "configs"


def _cases(duration_s: float) -> list[tuple[str, Callable]]:
    """(name, scenario factory): a fresh scenario for each use (sites carry state)."""
    def beams(reuse: int) -> dict:
        return {**shell(), "beams": {"layout": "hex", "rings": 2, "reuse": reuse}}
    nr = {**A3_POLICY, "procedure": "nr"}
    d = duration_s
    return [
        ("a3-noisy", lambda: scenario(d, [shell()], sites(2), [A3_POLICY], link=NOISY)),
        ("nr-procedure", lambda: scenario(d, [shell()], sites(2), [nr], link=NOISY)),
        ("beams-19", lambda: scenario(d, [beams(3)], sites(2), [nr], link={**NOISY, **SPOT})),
        ("interference", lambda: scenario(d, [beams(1)], sites(2), [A3_POLICY],
                                          link={**NOISY, **SPOT})),
        ("a3-8-sites", lambda: scenario(d, [shell()], sites(8), [A3_POLICY], link=NOISY)),
        ("weak-link", lambda: scenario(d, [shell()], sites(8), [A3_POLICY],
                                       link={**NOISY, **SPOT})),
    ]


def run_hash(scen) -> tuple[str, int]:
    """Hash of every record list and SINR histogram of a run; its handover count."""
    from ..kernel import run_scenario
    res, _ = run_scenario(scen, kernel="fast")
    parts = [[(k, v) for k, v in sorted(vars(r.records).items()) if isinstance(v, list)]
             + [r.records.sinr.counts.tobytes(), repr(r.records.sinr.sum_db), r.records.sinr.n]
             for r in res]
    return (hashlib.sha1(repr(parts).encode()).hexdigest()[:12],
            sum(len(r.records.handovers) for r in res))


def window_hash(scen) -> tuple[str, int]:
    """Hash of every terminal's window and floor-pass frames; their row count."""
    from ..orbits.geometry import Geometry
    geo = Geometry(scen, slots=False)
    geo.run_all()
    frames = [geo.window_frame(k, floor_passes=fp) for fp in (False, True)
              for k in range(len(geo.sites))]
    geo.close()
    digest = hashlib.sha1(b"".join(pd.util.hash_pandas_object(f, index=False).values.tobytes()
                                   for f in frames)).hexdigest()[:12]
    return digest, sum(len(f) for f in frames)


def main(argv: list[str]) -> None:
    from ..io.config import load_scenario
    cases = _cases(21600.0) + [("quick.toml", lambda: load_scenario(CONFIGS / "quick.toml"))]
    if "--demo" in argv:
        cases.append(("demo.toml", lambda: load_scenario(CONFIGS / "demo.toml")))
    for name, make in cases:
        t0 = time.perf_counter()
        windows, n_w = window_hash(make())
        runs, n_ho = run_hash(make())
        print(f"{name:<14} windows {windows} ({n_w})  records {runs} ({n_ho} handovers)  "
              f"{time.perf_counter() - t0:.1f} s", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
