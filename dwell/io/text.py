"""Plain aligned text tables for the terminal (summaries, comparisons, pass counts)."""

from __future__ import annotations


def format_table(df, columns: dict[str, str], digits: int = 3) -> str:
    """Plain aligned text table of chosen columns (header labels from ``columns``)."""
    heads = list(columns.values())
    rows = []
    for _, r in df.iterrows():
        cells = []
        for key in columns:
            v = r[key]
            if isinstance(v, float):
                cells.append(f"{v:.{digits}g}" if abs(v) < 1e4 else f"{v:.0f}")
            else:
                cells.append(str(v))
        rows.append(cells)
    widths = [max(len(h), *(len(c[i]) for c in rows)) if rows else len(h)
              for i, h in enumerate(heads)]
    line = "  ".join(h.ljust(w) for h, w in zip(heads, widths))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(cells, widths)) for cells in rows]
    return "\n".join(out)
