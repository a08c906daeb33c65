"""Words and tables for people: aligned plain-text tables, and the one sentence
that says what a bit means.

No click and no pandas here (the command line, the demo and quick commands all
use it): numpy and pandas values are recognised through ``sys.modules``, since
such a value can only exist once its library was imported.
"""

from __future__ import annotations

import math
import sys
from datetime import datetime
from typing import Any, Sequence

__all__ = ["bits_in_words", "cell_text", "is_missing", "table_lines"]


def bits_in_words(gamma: float = 0.05) -> str:
    """What a bit means, in one sentence (printed once by ``gain`` and the demo).

    Bits over uniform are log2(q / p): q a search's per-query chance of
    landing in the target set, p a uniform draw's chance (DESIGN.md, section 7).
    """
    top = f"{gamma:.0%}" if round(100 * gamma) == 100 * gamma else f"{gamma:.1%}"
    return (f"bits: +1 bit = twice as likely per query as a uniform random draw to land in the top {top} of "
            "scores, +2 bits = 4 times, -1 bit = half as likely; a gain is warm's bits minus cold's")


def is_missing(value: Any) -> bool:
    """None, or pandas' missing markers (NaT, NA) when pandas is loaded."""
    if value is None:
        return True
    pd = sys.modules.get("pandas")
    return pd is not None and (value is pd.NaT or value is pd.NA)


def cell_text(value: Any, digits: int = 4) -> str:
    """A value as a table cell: numbers to ``digits`` significant digits, missing as ``-``,
    times to the minute, a dict as ``k=v`` pairs."""
    if isinstance(value, dict):
        return ",".join(f"{k}={v}" for k, v in value.items()) if value else ""
    np = sys.modules.get("numpy")
    if np is not None and isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return "-" if math.isnan(value) else f"{value:.{digits}g}"
    if is_missing(value):
        return "-"
    if isinstance(value, datetime):  # pandas' Timestamp too
        return value.strftime("%Y-%m-%d %H:%M")
    return str(value)


def _is_number(value: Any) -> bool:
    np = sys.modules.get("numpy")
    return isinstance(value, (int, float)) or (np is not None and isinstance(value, np.number))


def table_lines(columns: Sequence[str], rows: Sequence[Sequence[Any]],
                numeric: Sequence[bool] | None = None, digits: int = 4) -> list[str]:
    """An aligned text table: a header, a rule, one line per row.

    Numbers are right-aligned (``numeric``: per column; default: a column
    whose values are all numbers or missing), everything else left-aligned;
    a missing value shows as ``-``.

    Examples
    --------
    >>> print("\\n".join(table_lines(["task", "score"], [["a", 0.5], ["bb", 0.25]])))
    task  score
    ----  -----
    a       0.5
    bb     0.25
    """
    cells = [[cell_text(v, digits) for v in row] for row in rows]
    headers = [str(c) for c in columns]
    widths = [max([len(h)] + [len(r[j]) for r in cells]) for j, h in enumerate(headers)]
    if numeric is None:
        numeric = [all(_is_number(row[j]) or is_missing(row[j]) for row in rows)
                   and any(_is_number(row[j]) for row in rows) for j in range(len(headers))]

    def line(values: list[str]) -> str:
        parts = [v.rjust(w) if num else v.ljust(w) for v, w, num in zip(values, widths, numeric)]
        return "  ".join(parts).rstrip()

    return [line(headers), "  ".join("-" * w for w in widths)] + [line(row) for row in cells]
