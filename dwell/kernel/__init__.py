"""Run every terminal of a scenario under every policy on one simpy environment.

All runs share one geometry pass (SGP4 once per chunk) and, per terminal, one measurement
stream; the environment advances every run in time order, so each stream keeps only the rows
its slowest reader still needs.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import simpy

from .. import policies as policy_mod
from ..io.config import Scenario
from ..orbits.geometry import Geometry
from ..radio.measure import MeasurementStream
from .common import Execution, Records, RunSettings
from .fast import FastRun
from .naive import NaiveRun

KERNELS = {"fast": FastRun, "naive": NaiveRun}


@dataclass
class RunResult:
    terminal: str
    site_index: int
    policy: str
    records: Records
    settings: RunSettings
    uncovered: list = field(default_factory=list)   # the terminal's instants with no cell


def run_scenario(scen: Scenario, *, kernel: str = "fast", geometry: Geometry | None = None,
                 terminals: list[int] | None = None, policy_tables: list[dict] | None = None,
                 progress: Callable[[float, float], None] | None = None,
                 warn: Callable[[str], None] | None = None) -> tuple[list[RunResult], Geometry]:
    """Run the chosen terminals (scenario indices, default all) under the chosen policies
    (default all).  A geometry passed in must hold those terminals' sites."""
    chosen = list(range(len(scen.terminals))) if terminals is None else list(terminals)
    geo = geometry or Geometry(scen, warn=warn, sites=[scen.sites[i] for i in chosen])
    period = float(scen.scenario["measurement_period_s"])
    tables = scen.policies if policy_tables is None else policy_tables
    if not tables:
        from ..io.errors import InputError
        raise InputError(scen.source, "[[policy]]", None, "dwell run needs at least one policy",
                         show_value=False)
    env = simpy.Environment()
    results: list[RunResult] = []
    cls = KERNELS[kernel]
    position = {site.index: j for j, site in enumerate(geo.sites)}
    for ti in chosen:
        if ti not in position:
            raise ValueError(f"the geometry does not hold terminal {ti}")
        k = position[ti]
        term = scen.terminals[ti]
        stream = MeasurementStream(geo, k, scen.link, period, scen.seed)
        for table in tables:
            policy = policy_mod.build(table, period, scen.base_dir)
            settings = RunSettings.of(term, policy, stream.lp, geo.duration_s, period)
            ex = Execution(settings, stream)
            cls(env, policy, ex)
            results.append(RunResult(term["name"], k, policy.name, ex.rec, settings,
                                     stream.uncovered))
    if progress is None:
        env.run()
    else:
        step = max(geo.duration_s / 50.0, 1.0)
        t = 0.0
        while t < geo.duration_s:
            t = min(geo.duration_s, t + step)
            env.run(until=t)
            progress(t, geo.duration_s)
        env.run()
    return results, geo
