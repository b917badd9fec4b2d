"""Small numeric CSV files (masks, tracks): header check and line-numbered errors."""

from __future__ import annotations

import csv
import math
from pathlib import Path

from ..io.errors import InputError


def _records(body: str, path: Path):
    """(line number, cells) per line; a malformed line is an input error naming it."""
    for number, line in enumerate(body.splitlines(), start=1):
        try:
            cells = next(csv.reader([line]), [])
        except csv.Error as exc:
            raise InputError(str(path), f"line {number}", line[:40], f"not CSV ({exc})") from None
        yield number, cells


def read_numeric_csv(path: str | Path, columns: tuple[str, ...], *,
                     text_columns: tuple[str, ...] = ()) -> list[tuple[int, dict[str, object]]]:
    """Rows of a CSV whose header holds exactly ``columns`` (any order).

    Returns (line number, row) pairs; values are floats except ``text_columns`` (kept as
    stripped text when they are not numbers).  Raises :class:`InputError` naming the line.
    """
    path = Path(path)
    try:
        body = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(str(path), None, None, f"cannot read: {exc}") from None
    header = None
    rows: list[tuple[int, dict[str, object]]] = []
    for number, record in _records(body, path):
        if not record or all(not c.strip() for c in record) or record[0].lstrip().startswith("#"):
            continue
        if header is None:
            header = [c.strip() for c in record]
            if sorted(header) != sorted(columns):
                raise InputError(str(path), f"line {number} (header)", ",".join(header),
                                 "header must be " + ",".join(columns))
            continue
        if len(record) != len(header):
            raise InputError(str(path), f"line {number}", ",".join(record),
                             f"expected {len(header)} values")
        row: dict[str, object] = {}
        for name, cell in zip(header, record):
            cell = cell.strip()
            try:
                value = float(cell)
                if not math.isfinite(value):
                    raise ValueError
                row[name] = value
            except ValueError:
                if name in text_columns and cell:
                    row[name] = cell
                else:
                    raise InputError(str(path), f"line {number}, {name}", cell,
                                     "must be a finite number") from None
        rows.append((number, row))
    if header is None:
        raise InputError(str(path), None, None, "empty file (header " + ",".join(columns) +
                         " expected)")
    if not rows:
        raise InputError(str(path), None, None, "no data rows after the header")
    return rows
