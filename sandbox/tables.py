"""Plain-text tables for the terminal (what a person reads)."""

from __future__ import annotations

from collections.abc import Sequence


def table(rows: Sequence[Sequence[object]], header: Sequence[str] | None = None) -> str:
    """Left-aligned text columns separated by two spaces; a rule under the header."""
    cells = [[str(c) for c in row] for row in rows]
    if header:
        cells.insert(0, [str(h) for h in header])
    if not cells:
        return ""
    widths = [max(len(row[i]) for row in cells if i < len(row)) for i in range(len(cells[0]))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in cells]
    if header:
        lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def fmt(value: float, digits: int = 4) -> str:
    """A number with ``digits`` significant figures, no exponent for everyday sizes."""
    if value == 0:
        return "0"
    magnitude = abs(value)
    if 1e-3 <= magnitude < 1e6:
        text = f"{value:.{digits}g}"
        return text
    return f"{value:.{digits - 1}e}"
