"""Tables written part by part: each batch of terminals stores its rows as it finishes, and
the parts of a table are joined into its one Parquet file at the end, so no process holds a
whole run's per-event tables (a 10,000-terminal day has tens of millions of rows).

A part is a batch's frame as Parquet bytes appended to an anonymous file (:class:`PartStore`,
one per process, in the output's folder: unlinked from the start, so the system frees it
however the run ends - even a killed run leaves nothing behind).  A part is filed under its
table and the index of its batch's first terminal, so the parts of a table sort into terminal
order whichever process wrote them and in whatever order they finished.  Parts keep times in
scenario seconds (exact floats: the load tables floor them); the run writes each table's
parts, read one at a time, as one file with UTC timestamps
(:func:`dwell.io.tables.write_tables`: canonical row groups, so the bytes do not depend on how
the terminals were split).  Cost: one fast-compressed write and one read of every row.
"""

from __future__ import annotations

import io
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .tables import arrow_columns, unified_schema


@dataclass(frozen=True)
class Part:
    table: str
    order: int             # index of the batch's first terminal
    offset: int            # bytes into its store's file
    size: int
    rows: int
    schema: pa.Schema


class PartStore:
    """An anonymous file that one process appends parts to (a forked worker inherits the
    open file; it hands its :attr:`parts` back to the parent, which reads them from the same
    file)."""

    def __init__(self, folder: str | Path):
        self.file = tempfile.TemporaryFile(dir=folder)    # unlinked: gone when closed or killed
        self.end = 0
        self.parts: list[Part] = []

    def add(self, frames: dict[str, pd.DataFrame], order: int) -> None:
        """Append each frame as the part ``order`` of its table."""
        for name, df in frames.items():
            table = arrow_columns(df)
            buf = io.BytesIO()
            pq.write_table(table, buf, compression="lz4")
            data = buf.getvalue()
            written = 0
            while written < len(data):
                written += os.pwrite(self.file.fileno(), data[written:], self.end + written)
            self.parts.append(Part(name, order, self.end, len(data), table.num_rows,
                                   table.schema))
            self.end += len(data)

    def read(self, part: Part, columns: list[str] | None = None) -> pa.Table:
        data = os.pread(self.file.fileno(), part.size, part.offset)
        if len(data) != part.size:
            raise OSError(f"part {part.table}.{part.order} cut short")
        have = set(part.schema.names)
        return pq.read_table(pa.BufferReader(data), columns=None if columns is None else
                             [c for c in columns if c in have])

    def close(self) -> None:
        self.file.close()


class TableParts:
    """The part stores of one run (anonymous files in ``folder``)."""

    def __init__(self, folder: str | Path):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.stores: list[PartStore] = []

    def store(self) -> PartStore:
        """A new store (make one per worker before forking)."""
        s = PartStore(self.folder)
        self.stores.append(s)
        return s

    def _parts(self, name: str) -> list[tuple[Part, PartStore]]:
        found = [(p, s) for s in self.stores for p in s.parts if p.table == name]
        return sorted(found, key=lambda ps: ps[0].order)

    def schema(self, name: str) -> pa.Schema | None:
        """The table's schema: that of its parts with rows (an empty part's column types
        carry no values, pandas may have guessed them), or the first part's if all are
        empty; None without parts."""
        parts = [p for p, _ in self._parts(name)]
        full = [p.schema for p in parts if p.rows]
        return unified_schema(full or [p.schema for p in parts[:1]])

    def tables(self, name: str, columns: list[str] | None = None) -> Iterator[pa.Table]:
        """The parts of table ``name`` in terminal order (only ``columns`` when given)."""
        for part, store in self._parts(name):
            yield store.read(part, columns)

    def close(self) -> None:
        for s in self.stores:
            s.close()


class FrameSource:
    """Tables held in memory as frames, offered as :class:`TableParts` offers its parts (one
    part per table), so both are written by the same code."""

    def __init__(self, frames: dict[str, pd.DataFrame]):
        self.frames = frames
        self._arrow: dict[str, pa.Table] = {}

    def _table(self, name: str) -> pa.Table:
        if name not in self._arrow:
            self._arrow[name] = arrow_columns(self.frames[name])
        return self._arrow[name]

    def schema(self, name: str) -> pa.Schema | None:
        return self._table(name).schema if name in self.frames else None

    def tables(self, name: str, columns: list[str] | None = None) -> Iterator[pa.Table]:
        table = self._table(name)
        yield table if columns is None else table.select(
            [c for c in columns if c in table.column_names])
