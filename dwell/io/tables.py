"""Parquet tables with provenance: UTC timestamps, dictionary-typed categories, key-value
metadata (tool version, config hash, seed, scenario start and duration), written atomically."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .. import __version__
from .atomic import atomic_path

CATEGORY_COLUMNS = ("terminal", "policy", "satellite", "shell", "from_satellite", "to_satellite",
                    "trigger", "cause", "start_cause", "end_cause", "end_reason", "start_reason",
                    "quantity", "area", "level", "element", "direction")


def provenance(scen) -> dict[str, str]:
    """Metadata every output file carries."""
    return {
        "dwell.version": __version__,
        "dwell.config_sha256": scen.config_hash(),
        "dwell.seed": str(scen.seed),
        "dwell.scenario_start": scen.scenario["start"],
        "dwell.duration_s": repr(float(scen.scenario["duration_s"])),
        "dwell.scenario_name": scen.scenario["name"],
    }


def to_arrow(df: pd.DataFrame, epoch=None, metadata: dict[str, str] | None = None) -> pa.Table:
    """Arrow table: ``*_utc`` columns as UTC timestamps (from scenario seconds when given as
    float), category columns dictionary-encoded; metadata attached."""
    cols = {}
    for name in df.columns:
        values = df[name]
        if name.endswith("_utc"):
            if values.dtype == object and all(
                    isinstance(v, (int, float)) and not isinstance(v, bool) for v in values.tolist()):
                values = values.astype("float64")   # scenario seconds held as objects
            if values.dtype.kind == "f" and epoch is not None:
                arr = epoch.utc(values.to_numpy())
            else:
                arr = values.to_numpy().astype("datetime64[us]")
            cols[name] = pa.array(arr, type=pa.timestamp("us", tz="UTC"))
        elif name in CATEGORY_COLUMNS:
            cols[name] = pa.array(values.astype(str).to_numpy(dtype=object),
                                  type=pa.string()).dictionary_encode()
        elif getattr(values.dtype, "kind", "O") in "biuf":
            cols[name] = pa.array(values.to_numpy())
        else:  # text (object or pandas string dtype), missing values as nulls
            cols[name] = pa.array([None if (v is None or (isinstance(v, float) and v != v)) else v
                                   for v in values.astype(object).tolist()])
    table = pa.table(cols) if cols else pa.table({})
    if metadata:
        table = table.replace_schema_metadata({**(table.schema.metadata or {}),
                                               **{k.encode(): v.encode() for k, v in metadata.items()}})
    return table


def write_table(table: pa.Table, path: str | Path) -> None:
    """Write a Parquet file atomically (deterministic: no wall clock in the file)."""
    with atomic_path(path) as tmp:
        pq.write_table(table, tmp, compression="zstd", write_statistics=True,
                       store_schema=True)


def write_frame(df: pd.DataFrame, path: str | Path, scen=None, extra: dict[str, Any] | None = None
                ) -> None:
    meta = provenance(scen) if scen is not None else {}
    if extra:
        meta.update({k: str(v) for k, v in extra.items()})
    write_table(to_arrow(df, scen.epoch if scen is not None else None, meta), path)


def read_metadata(path: str | Path) -> dict[str, str]:
    md = pq.read_schema(path).metadata or {}
    return {k.decode(): v.decode() for k, v in md.items() if k.decode().startswith("dwell.")}



