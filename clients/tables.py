"""Aligned plain-text tables and number formatting for the command line.

Text columns are left-aligned, numeric columns right-aligned, every column as wide as its widest
cell. Money figures print with thousands separators and two decimals; intervals print as
``[lo, hi]``. Nothing here knows about models: callers pass rows of already-computed cells.
"""

from __future__ import annotations

import math
from typing import Any, Sequence


def money(x: float | None, digits: int = 2) -> str:
    """``1234.5 -> '1,234.50'``; None or non-finite -> ``'-'``."""
    if x is None or not math.isfinite(float(x)):
        return "-"
    return f"{float(x):,.{digits}f}"


def interval(iv: Sequence[float] | None, digits: int = 2) -> str:
    """``(lo, hi) -> '[lo, hi]'`` with :func:`money` formatting; None -> ``'-'``."""
    if iv is None:
        return "-"
    return f"[{money(iv[0], digits)}, {money(iv[1], digits)}]"


def percent(x: float | None, digits: int = 1) -> str:
    if x is None or not math.isfinite(float(x)):
        return "-"
    return f"{100.0 * float(x):.{digits}f} %"


def _is_number(cell: Any) -> bool:
    if isinstance(cell, bool):
        return False
    if isinstance(cell, (int, float)):
        return True
    if isinstance(cell, str):
        s = cell.replace(",", "").replace("%", "").replace(" ", "").lstrip("+-")
        if s.startswith("[") or s in ("", "-"):
            return cell.strip().startswith("[") or cell.strip() == "-"
        try:
            float(s)
            return True
        except ValueError:
            return False
    return False


def format_table(headers: Sequence[str], rows: Sequence[Sequence[Any]], indent: int = 2,
                 align: Sequence[str] | None = None) -> str:
    """The rows as an aligned table with a header and a rule line.

    ``align``: per column ``"l"`` or ``"r"``; by default a column is right-aligned when every
    non-empty cell in it reads as a number (or an interval / ``-``), else left-aligned.
    Cells are turned into text with ``str`` (format numbers before passing them for control)."""
    text = [[("" if c is None else str(c)) for c in r] for r in rows]
    ncol = len(headers)
    for i, r in enumerate(text):
        if len(r) != ncol:
            raise ValueError(f"row {i} has {len(r)} cells, the header has {ncol}")
    if align is None:
        align = []
        for j in range(ncol):
            col = [rows[i][j] for i in range(len(rows)) if text[i][j] != ""]
            align.append("r" if col and all(_is_number(c) for c in col) else "l")
    widths = [max([len(headers[j])] + [len(r[j]) for r in text]) for j in range(ncol)]
    pad = " " * indent

    def line(cells: Sequence[str]) -> str:
        out = [c.rjust(w) if a == "r" else c.ljust(w) for c, w, a in zip(cells, widths, align)]
        return (pad + "  ".join(out)).rstrip()

    lines = [line(list(headers)), pad + "  ".join("-" * w for w in widths)]
    lines.extend(line(r) for r in text)
    return "\n".join(lines)


def print_table(headers: Sequence[str], rows: Sequence[Sequence[Any]], **kw: Any) -> None:
    print(format_table(headers, rows, **kw))
