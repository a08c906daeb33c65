"""What a DuckDB error says about an archive file, written once.

DuckDB reports a file held by another writer, a file that is not a database
and a damaged file as exceptions whose class and text vary; the functions here
turn them into warmstart's errors, naming the file and what to do.
"""

from __future__ import annotations

__all__ = ["first_line"]


def first_line(exc: BaseException) -> str:
    """The first line of an exception's text (its class name when it has none)."""
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__
