"""Parquet tables with provenance: UTC timestamps, dictionary-typed categories, key-value
metadata (tool version, config hash, seed, scenario start and duration), written atomically.

Every file is written in canonical row groups (:func:`write_tables`): rows in order, cut every
``ROW_GROUP_ROWS`` rows, each column's dictionary rebuilt per row group, so a file's bytes
depend on its rows only - not on whether they came as one frame or as parts written batch by
batch (:mod:`dwell.io.parts`)."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Iterable

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .. import __version__
from .atomic import atomic_path

CATEGORY_COLUMNS = ("terminal", "policy", "satellite", "shell", "from_satellite", "to_satellite",
                    "trigger", "cause", "start_cause", "end_cause", "end_reason", "start_reason",
                    "quantity", "area", "level", "element", "direction")
ROW_GROUP_ROWS = 1 << 17      # rows per row group: a reader's unit, and the writer's memory


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


def arrow_columns(df: pd.DataFrame) -> pa.Table:
    """Arrow table of a frame with ``*_utc`` columns still in scenario seconds (float64) where
    they are numbers: category columns dictionary-encoded, text with missing values as nulls.
    The form of table parts; :func:`utc_times` finishes it."""
    cols = {}
    for name in df.columns:
        values = df[name]
        if name.endswith("_utc"):
            if values.dtype == object and all(
                    isinstance(v, (int, float)) and not isinstance(v, bool) for v in values.tolist()):
                values = values.astype("float64")   # scenario seconds held as objects
            if values.dtype.kind == "f":
                cols[name] = pa.array(values.to_numpy())
            else:
                cols[name] = pa.array(values.to_numpy().astype("datetime64[us]"),
                                      type=pa.timestamp("us", tz="UTC"))
        elif name in CATEGORY_COLUMNS:
            if values.isna().any():          # missing (a listed terminal's area): null
                text = [None if pd.isna(v) else str(v) for v in values.astype(object).tolist()]
            else:
                text = values.astype(str).to_numpy(dtype=object)
            cols[name] = pa.array(text, type=pa.string()).dictionary_encode()
        elif getattr(values.dtype, "kind", "O") in "biuf":
            cols[name] = pa.array(values.to_numpy())
        else:  # text (object or pandas string dtype), missing values as nulls
            cols[name] = pa.array([None if (v is None or (isinstance(v, float) and v != v)) else v
                                   for v in values.astype(object).tolist()])
    return pa.table(cols) if cols else pa.table({})


def _is_seconds(field: pa.Field) -> bool:
    return field.name.endswith("_utc") and pa.types.is_floating(field.type)


def utc_schema(schema: pa.Schema) -> pa.Schema:
    """``schema`` with its ``*_utc`` seconds columns typed as UTC timestamps."""
    return pa.schema([pa.field(f.name, pa.timestamp("us", tz="UTC")) if _is_seconds(f) else f
                      for f in schema])


def utc_times(table: pa.Table, epoch=None) -> pa.Table:
    """``*_utc`` scenario-seconds columns as UTC timestamps (from ``epoch``'s start; without
    an epoch the numbers are taken as microseconds since 1970)."""
    for i, f in enumerate(table.schema):
        if _is_seconds(f):
            values = table.column(i).to_numpy()
            arr = epoch.utc(values) if epoch is not None else values.astype("datetime64[us]")
            table = table.set_column(i, f.name, pa.array(arr, type=pa.timestamp("us", tz="UTC")))
    return table


def to_arrow(df: pd.DataFrame, epoch=None, metadata: dict[str, str] | None = None) -> pa.Table:
    """Arrow table: ``*_utc`` columns as UTC timestamps (from scenario seconds when given as
    float), category columns dictionary-encoded; metadata attached."""
    table = utc_times(arrow_columns(df), epoch)
    if metadata:
        table = table.replace_schema_metadata({**(table.schema.metadata or {}),
                                               **_encoded(metadata)})
    return table


def _encoded(metadata: dict[str, str]) -> dict[bytes, bytes]:
    return {k.encode(): v.encode() for k, v in metadata.items()}


def unified_schema(schemas: Iterable[pa.Schema]) -> pa.Schema | None:
    """One schema for tables that may differ where a part had no values (a null column) or
    integers where another had floats; None for no schemas."""
    schemas = [s.remove_metadata() for s in schemas]
    if not schemas:
        return None
    return pa.unify_schemas(schemas, promote_options="permissive")


def conform(table: pa.Table, schema: pa.Schema) -> pa.Table:
    """``table`` with ``schema``'s columns (in its order; missing ones as nulls) and types."""
    if table.schema.remove_metadata().equals(schema):
        return table
    cols = []
    for f in schema:
        col = (table.column(f.name) if f.name in table.column_names
               else pa.nulls(table.num_rows, f.type))
        cols.append(col if col.type == f.type else col.cast(f.type))
    return pa.Table.from_arrays(cols, schema=schema)


def _canonical(group: pa.Table, epoch) -> pa.Table:
    """One row group: each column in one chunk, dictionaries rebuilt from the rows (a slice
    keeps its parent's whole dictionary), seconds as timestamps."""
    cols = []
    for f, col in zip(group.schema, group.columns):
        if pa.types.is_dictionary(f.type):
            plain = col.cast(f.type.value_type).combine_chunks()
            col = pc.dictionary_encode(plain)
            if col.type != f.type:
                col = col.cast(f.type)
        else:
            col = col.combine_chunks()
        cols.append(col)
    return utc_times(pa.Table.from_arrays(cols, schema=group.schema), epoch)


def write_tables(tables: Iterable[pa.Table], path: str | Path, *, epoch=None,
                 metadata: dict[str, str] | None = None, schema: pa.Schema | None = None
                 ) -> int:
    """Write ``tables`` (the rows of one table, in order, with times in scenario seconds as
    :func:`arrow_columns` leaves them) as one Parquet file, atomically and deterministically
    (no wall clock in the file).  Row groups hold ``ROW_GROUP_ROWS`` rows (the last one fewer)
    and are canonical, so the bytes depend on the rows, the schema and the metadata only.
    ``schema`` (default: the first table's) is the one every table is conformed to.  Returns
    the number of rows; holds at most two row groups' worth of rows at a time."""
    rows = 0
    with atomic_path(path) as tmp:
        writer = None
        pending: list[pa.Table] = []
        held = 0

        def flush(n: int) -> None:
            nonlocal writer, pending, held
            joined = pa.concat_tables(pending) if pending else schema.empty_table()
            group = _canonical(joined.slice(0, n), epoch)
            rest = joined.slice(n)
            pending, held = ([rest] if rest.num_rows else []), held - n
            if writer is None:
                meta = {**(group.schema.metadata or {}), **_encoded(metadata or {})}
                writer = pq.ParquetWriter(tmp, group.schema.with_metadata(meta),
                                          compression="zstd", write_statistics=True,
                                          store_schema=True)
            writer.write_table(group, row_group_size=ROW_GROUP_ROWS)

        try:
            for table in tables:
                if schema is None:
                    schema = table.schema.remove_metadata()
                pending.append(conform(table, schema))
                held += table.num_rows
                rows += table.num_rows
                while held >= ROW_GROUP_ROWS:
                    flush(ROW_GROUP_ROWS)
            if schema is None:
                schema = pa.schema([])
            if held or writer is None:
                flush(held)
        finally:
            if writer is not None:
                writer.close()
    return rows


def write_table(table: pa.Table, path: str | Path) -> None:
    """Write a Parquet file atomically (deterministic: no wall clock in the file); the
    table's schema metadata is kept."""
    meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
    write_tables([table.replace_schema_metadata(None)], path, metadata=meta)


def write_frame(df: pd.DataFrame, path: str | Path, scen=None, extra: dict[str, Any] | None = None
                ) -> None:
    meta = provenance(scen) if scen is not None else {}
    if extra:
        meta.update({k: str(v) for k, v in extra.items()})
    write_tables([arrow_columns(df)], path, epoch=scen.epoch if scen is not None else None,
                 metadata=meta)


def read_metadata(path: str | Path) -> dict[str, str]:
    md = pq.read_schema(path).metadata or {}
    return {k.decode(): v.decode() for k, v in md.items() if k.decode().startswith("dwell.")}
