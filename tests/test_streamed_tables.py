"""Tables stored part by part (dwell/io/parts.py) and load tables built a range of elements at a
time (dwell/analysis/load.py) give the run folder a run held in memory gives.

The contract (run.py: "every terminal's results depend on nothing but its own index, so the
tables are those of one batch holding them all"; io/tables.py: a file's bytes "depend on its
rows only"; analysis/load.py: an element's rows "do not depend on the ranges"), checked on a
small noisy area run with population weights, with the row groups, the batches and the load
ranges all made tiny so that every join and every range boundary is exercised:

- a run of one terminal per batch on two processes writes the same bytes as the run held in
  memory in one process (same row-group and range sizes);
- with the default sizes the rows are the same (the burst weights are sums of floats taken in
  another grouping, so equal to rounding, 1e-12 relative);
- nothing but the run folder is left behind, and the tables read back from it (times
  as microsecond timestamps) are the in-memory tables to the microsecond.

Cost: four 20-minute runs of six terminals, about 15 s.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from dwell import run
from dwell.analysis import load
from dwell.io import tables
from dwell.io.config import scenario_from_dict

START = "2027-05-10T00:00:00Z"


def _scenario(tmp: Path):
    raw = {"scenario": {"name": "plains", "start": START, "duration_s": 1200.0, "seed": 5},
           "constellation": [{"kind": "walker-delta", "name": "heron", "satellites": 720,
                              "planes": 36, "phasing": 1, "altitude_km": 600.0,
                              "inclination_deg": 55.0}],
           "terminal": [{"name": "mill", "lat_deg": 45.5, "lon_deg": 9.0}],
           "area": [{"name": "plain", "lat_min_deg": 44.0, "lat_max_deg": 47.0,
                     "lon_min_deg": 7.0, "lon_max_deg": 11.0, "count": 5, "seed": 3,
                     "weight": 2.5}],
           "link": {"shadowing_std_db": 2.0, "measurement_noise_db": 1.0},
           "policy": [{"name": "a3", "rule": "a3", "offset_db": 1.0, "hysteresis_db": 1.0,
                       "time_to_trigger_s": 0.32}]}
    return scenario_from_dict(raw, str(tmp / "s.toml"), tmp)


def _files(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("streamed")
    mp = pytest.MonkeyPatch()
    out = {}
    try:
        out["default_memory"] = tmp / "default-memory"
        held = run.execute(_scenario(tmp), out["default_memory"], workers=1)
        mp.setattr(tables, "ROW_GROUP_ROWS", 64)
        mp.setattr(load, "EVENTS_PER_PASS", 150)
        out["tiny_memory"] = tmp / "tiny-memory"
        run.execute(_scenario(tmp), out["tiny_memory"], workers=1)
        mp.setattr(run, "TERMINAL_BATCH", 1)
        out["tiny_parts"] = tmp / "tiny-parts"
        streamed = run.execute(_scenario(tmp), out["tiny_parts"], workers=2)
        mp.undo()
        mp.setattr(run, "TERMINAL_BATCH", 2)
        out["default_parts"] = tmp / "default-parts"
        run.execute(_scenario(tmp), out["default_parts"], workers=1)
    finally:
        mp.undo()
    return out, held, streamed


def test_parts_write_the_bytes_of_a_run_held_in_memory(runs):
    out, held, _ = runs
    assert len(held.frames["handovers"]) > 100          # enough rows for many tiny row groups
    a, b = _files(out["tiny_memory"]), _files(out["tiny_parts"])
    assert a.keys() == b.keys()
    assert [n for n in a if a[n] != b[n]] == []
    assert _files(out["default_memory"]) == _files(out["default_parts"])


def test_row_groups_and_load_ranges_do_not_change_the_rows(runs):
    out, _, _ = runs
    import pyarrow.parquet as pq
    assert pq.ParquetFile(out["tiny_memory"] / "handovers.parquet").num_row_groups > 2
    for name in run.STREAMED + ("summary", "load", "load_peaks", "map", "areas"):
        pd.testing.assert_frame_equal(pd.read_parquet(out["default_memory"] / f"{name}.parquet"),
                                      pd.read_parquet(out["tiny_memory"] / f"{name}.parquet"))
    a = pd.read_parquet(out["default_memory"] / "load_bursts.parquet")
    b = pd.read_parquet(out["tiny_memory"] / "load_bursts.parquet")
    pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=1e-12)  # float sums regrouped


def test_streamed_run_reads_its_tables_back(runs):
    out, held, streamed = runs
    # parts live in anonymous files (io/parts.py): nothing hidden is left beside or inside
    folder = out["tiny_parts"]
    assert not [p for p in list(folder.iterdir()) + list(folder.parent.iterdir())
                if p.name.startswith(".")]
    for name in ("handovers", "links", "load"):
        a, b = held.frames[name], streamed.frames[name]
        assert len(a) == len(b)
        for col in a.columns:
            x, y = a[col], b[col]
            if col.endswith("_utc"):       # the files hold microseconds
                assert np.allclose(x.to_numpy(float), y.to_numpy(float), atol=1e-6, rtol=0,
                                   equal_nan=True)
            else:
                assert x.astype(str).tolist() == y.astype(str).tolist(), col
