"""What a DuckDB error says about an archive file, written once.

DuckDB reports a file held by another writer, a file that is not a database
and a damaged file as exceptions whose class and text vary with the case; the
functions here recognise them and turn them into warmstart's errors, each
naming the file and what to do:

- **locked** (:class:`~warmstart.errors.ArchiveLockedError`): another process
  holds the file for writing (DuckDB allows one writing process);
- **not a database** (:class:`~warmstart.errors.ArchiveError`): the file is
  not a DuckDB database at all;
- **damaged** (:class:`~warmstart.errors.ArchiveDamagedError`): the file is
  cut short (a read past its end) or a block fails DuckDB's checksum. DuckDB
  checks a block when it reads it, so a damaged block in the middle of a big
  table shows up only in a query that reads that block: :func:`check_blocks`
  reads every value of every column (``curate check`` and every opening of
  an archive for writing run it, so nothing is written into a damaged file).

Everything else is left alone (``archive_error`` returns None): it is not
about the file.
"""

from __future__ import annotations

import contextlib
import re
import shlex
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Iterator

import duckdb

from warmstart.archive.sql import fetch, quoted, table_columns
from warmstart.errors import ArchiveDamagedError, ArchiveError, ArchiveLockedError

__all__ = [
    "LOCKED", "NOT_A_DATABASE", "DAMAGED", "first_line", "fault_of", "damaged_file", "archive_error",
    "damaged_error", "translated", "Unreadable", "unreadable_columns", "check_blocks",
]

LOCKED, NOT_A_DATABASE, DAMAGED = "locked", "not a database", "damaged"

# Texts of DuckDB's errors (DuckDB 1.x and 2.0), lower case. A damaged block is
# reported as "Corrupt database file: computed checksum ... in block at location N";
# a file cut short as "IO Error: Could not read enough bytes from file ...".
_DAMAGE_TEXTS = ("corrupt database file", "could not read enough bytes", "does not match stored checksum")
_LOCK_TEXTS = ("could not set lock", "conflicting lock")
_NOT_A_DATABASE_TEXTS = ("not a valid duckdb database",)
_FILE_IN_TEXT = re.compile(r'from file "([^"]+)"')


def first_line(exc: BaseException) -> str:
    """The first line of an exception's text (its class name when it has none)."""
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def fault_of(exc: BaseException) -> str | None:
    """What a DuckDB error says about the file: :data:`LOCKED`,
    :data:`NOT_A_DATABASE`, :data:`DAMAGED`, or None (not about the file)."""
    if not isinstance(exc, duckdb.Error):
        return None
    text = str(exc).lower()
    if any(mark in text for mark in _DAMAGE_TEXTS):  # first: "block" contains "lock"
        return DAMAGED
    if any(mark in text for mark in _LOCK_TEXTS):
        return LOCKED
    if any(mark in text for mark in _NOT_A_DATABASE_TEXTS):
        return NOT_A_DATABASE
    return None


def damaged_file(exc: BaseException) -> str | None:
    """The file a DuckDB read error names (a read past the end names it; a
    checksum error does not)."""
    found = _FILE_IN_TEXT.search(str(exc))
    return found.group(1) if found else None


def _pid_hint(text: str) -> str:
    found = re.search(r"PID (\d+)", text)
    return f"held by process {found.group(1)}" if found else "the file is locked"


def damaged_error(path: str | Path, detail: str) -> ArchiveDamagedError:
    """The error for a damaged archive file: what is wrong and what to do.

    Parameters
    ----------
    path : str or Path
        The damaged file.
    detail : str
        What was seen (DuckDB's message, or the size check's finding).
    """
    quoted = shlex.quote(str(path))
    return ArchiveDamagedError(
        f"{path}: the archive file is damaged ({detail}). Keep this file as it is; "
        f"`warmstart curate salvage {quoted} NEW.duckdb` copies every table and row that can still be read "
        "into a new archive (it never writes to the damaged file), or restore the file from a backup"
    )


def archive_error(exc: BaseException, path: str | Path, *, source: bool = False) -> ArchiveError | None:
    """Translate a DuckDB error about an archive file into warmstart's error.

    Parameters
    ----------
    exc : BaseException
        What DuckDB raised while opening or reading ``path``.
    path : str or Path
        The archive file.
    source : bool, default False
        ``path`` is another archive being read (a merge source or a file to
        salvage), not the archive the command works on: the message says
        "that archive".

    Returns
    -------
    ArchiveError or None
        :class:`ArchiveLockedError`, :class:`ArchiveDamagedError` or
        :class:`ArchiveError` (not a database); None when the error is not
        about the file.
    """
    fault = fault_of(exc)
    text = first_line(exc)
    if fault == LOCKED:
        if source:
            return ArchiveLockedError(
                f"{path}: another process is writing to that archive, so it cannot be read now ({_pid_hint(text)}); "
                "wait for it to finish (or close it there), then run the command again; nothing was changed"
            )
        return ArchiveLockedError(
            f"{path}: another process is writing to this archive ({_pid_hint(text)}). "
            "DuckDB allows one writing process at a time: wait for it to finish, then run the command again; "
            "nothing was changed."
        )
    if fault == NOT_A_DATABASE:
        fix = "give the path of another warmstart archive file" if source else \
            "give another --archive path or move this file away"
        return ArchiveError(f"{path}: not a warmstart archive (the file is not a DuckDB database); {fix}")
    if fault == DAMAGED:
        return damaged_error(damaged_file(exc) or path, f"DuckDB: {text}")
    return None


@contextlib.contextmanager
def translated(path: str | Path, *, source: bool = False) -> Iterator[None]:
    """Context manager: DuckDB errors about ``path`` leave the block as
    warmstart's errors (:func:`archive_error`); any other error passes unchanged.

    Examples
    --------
    >>> with translated("team.duckdb"):
    ...     pass
    """
    try:
        yield
    except duckdb.Error as exc:
        error = archive_error(exc, path, source=source)
        if error is None:
            raise
        raise error from None


@dataclass(frozen=True)
class Unreadable:
    """One column of one table that cannot be read whole.

    Attributes
    ----------
    table, column : str
        Where.
    detail : str
        DuckDB's message (first line).
    """

    table: str
    column: str
    detail: str


def unreadable_columns(con: duckdb.DuckDBPyConnection, tables: Iterable[str], catalog: str | None = None,
                       progress: Callable[[int, int], None] | None = None) -> list[Unreadable]:
    """Read every value of every column of the archive's tables; list what fails.

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        A connection to the archive (or one it is attached to).
    tables : iterable of str
        The tables to read (names from the caller's allow-list); a table the
        file lacks is skipped.
    catalog : str, optional
        The archive's catalog name on ``con`` (default: the current one).
    progress : callable, optional
        Called as ``progress(done, total)`` in tables read.

    Returns
    -------
    list of Unreadable
        Empty when every block of every table reads and passes its checksum.
        Errors that are not damage (a missing table) are not listed.
    """
    catalog = catalog or fetch(con, "SELECT current_database()")[0][0]
    work = [(t, table_columns(con, catalog, t)) for t in tables]
    work = [(t, cols) for t, cols in work if cols]
    found = []
    for done, (table, columns) in enumerate(work, start=1):
        # bit_xor of hashes: every value is read (and its block checked), nothing is kept; one
        # query per table, then one per column only for a table that fails, to say where
        if _damage(con, catalog, table, columns) is not None:
            for column in columns:
                detail = _damage(con, catalog, table, [column])
                if detail is not None:
                    found.append(Unreadable(table, column, detail))
        if progress:
            progress(done, len(work))
    return found


def _damage(con: duckdb.DuckDBPyConnection, catalog: str, table: str, columns: list[str]) -> str | None:
    """DuckDB's message when reading every value of ``columns`` meets a damaged block, else None."""
    reads = ", ".join(f"bit_xor(hash({quoted(c)}))" for c in columns)
    try:
        fetch(con, f"SELECT {reads} FROM {quoted(catalog)}.main.{table}")
    except duckdb.Error as exc:
        if fault_of(exc) != DAMAGED:
            raise
        return first_line(exc)
    return None


def check_blocks(con: duckdb.DuckDBPyConnection, path: str | Path, tables: Iterable[str],
                 progress: Callable[[int, int], None] | None = None) -> None:
    """Raise :class:`ArchiveDamagedError` when a block of ``tables`` cannot be read.

    The message names the file, the tables and columns that cannot be read,
    and what to do; ``error.unreadable`` lists them as (table, column, detail).
    """
    found = unreadable_columns(con, tables, progress=progress)
    if not found:
        return
    by_table: dict[str, list[str]] = {}
    for item in found:
        by_table.setdefault(item.table, []).append(item.column)
    where = "; ".join(f"table {t}: column(s) {', '.join(cols)}" for t, cols in by_table.items())
    error = damaged_error(path, f"blocks that cannot be read in {where}; DuckDB: {found[0].detail}")
    raise ArchiveDamagedError(str(error), unreadable=[(u.table, u.column, u.detail) for u in found])
