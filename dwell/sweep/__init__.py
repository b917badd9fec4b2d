"""Batch policy sweeps: parameter grids over a base scenario, run as a resumable Parquet
dataset on local processes or a dask.distributed cluster (see :mod:`.spec`, :mod:`.execute`)."""

from .execute import combined_summary, execute_sweep, pending
from .spec import load_sweep

__all__ = ["combined_summary", "execute_sweep", "load_sweep", "pending"]
