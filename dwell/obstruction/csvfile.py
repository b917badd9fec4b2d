"""Small numeric CSV files (masks, tracks): header check and line-numbered errors.

Errors name the file, the line and the column with a reason, and never repeat the file's text:
a path pointed at the wrong file (an account database, a key) must not print its content.
Numbers that parsed are shown (they are values the user wrote, not arbitrary text)."""

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
            raise InputError(str(path), f"line {number}", None, f"not CSV ({exc})",
                             show_value=False) from None
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
        reason = "not UTF-8 text" if isinstance(exc, UnicodeDecodeError) else \
            f"cannot read: {exc.strerror or type(exc).__name__}"
        raise InputError(str(path), None, None, reason) from None
    header = None
    rows: list[tuple[int, dict[str, object]]] = []
    for number, record in _records(body, path):
        if not record or all(not c.strip() for c in record) or record[0].lstrip().startswith("#"):
            continue
        if header is None:
            header = [c.strip() for c in record]
            if sorted(header) != sorted(columns):
                raise InputError(str(path), f"line {number} (header)", None,
                                 "the header must be " + ",".join(columns), show_value=False)
            continue
        if len(record) != len(header):
            raise InputError(str(path), f"line {number}", None,
                             f"has {len(record)} values, expected {len(header)}",
                             show_value=False)
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
                    raise InputError(str(path), f"line {number}, {name}", None,
                                     "must be a finite number", show_value=False) from None
        rows.append((number, row))
    if header is None:
        raise InputError(str(path), None, None, "empty file (header " + ",".join(columns) +
                         " expected)")
    if not rows:
        raise InputError(str(path), None, None, "no data rows after the header")
    return rows
