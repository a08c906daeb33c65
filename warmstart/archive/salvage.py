"""Copying what can still be read from a damaged archive into a new one.

DuckDB keeps a checksum per block and checks it when it reads the block, so
damage in the middle of a file (a bad disk sector, a copy that flipped bits)
shows up only when a query reads that block; a file cut short fails when a
query reads past its end (:mod:`warmstart.archive.faults` recognises both and
finds them).

:func:`salvage_archive` attaches the damaged file read-only (it is never
written) and copies every table and row that can be read into a new archive.
A table is copied in one statement when it reads cleanly; otherwise piece by
piece, in the units DuckDB reads together (its column segments, from
``pragma_storage_info``, cut at every vector of 2,048 rows): a piece whose
rows all read is copied, one that fails is counted as lost. A row is copied
whole or not at all.
"""

from __future__ import annotations

import os
import uuid
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import duckdb

from warmstart.archive.faults import DAMAGED, archive_error, fault_of, first_line, translated, unreadable_columns
from warmstart.archive.sql import fetch, quoted, table_columns
from warmstart.archive.store import ARCHIVE_TABLES, SCHEMA_VERSION, Archive
from warmstart.errors import ArchiveDamagedError, ArchiveError

__all__ = ["TableSalvage", "SalvageReport", "salvage_archive", "SALVAGED_TABLES"]

#: tables a salvage copies, in this order (``schema_version`` is the new archive's own)
SALVAGED_TABLES = ("archive_info", "tasks", "profiles", "spaces", "studies", "trials", "leases", "requests",
                   "gain_reports")
#: schema version that added a table (schema_v2.sql): an older damaged file lacks it and loses nothing
_ADDED_IN = {"leases": 2, "requests": 2, "gain_reports": 2}
_SEQUENCES = {"tasks": ("task_ids", "task_id"), "spaces": ("space_ids", "space_id"),
              "studies": ("study_ids", "study_id"), "leases": ("trial_ids", "trial_id"),
              "gain_reports": ("gain_report_ids", "report_id")}
_ALIAS = "_warmstart_damaged"  # catalog name of the attached damaged file
_VECTOR_ROWS = 2048  # DuckDB's vector size: a scan reads whole vectors, so no piece is smaller


@dataclass(frozen=True)
class TableSalvage:
    """What a salvage did with one table.

    Attributes
    ----------
    table : str
        The table.
    rows : int or None
        Rows the damaged file holds (None when even that cannot be read).
    copied : int
        Rows copied into the new archive.
    unreadable_columns : tuple of str
        Columns with a block that cannot be read.
    lost_by_study : tuple of (int or None, int)
        For ``trials``: (study id, trials not copied) where the study id of
        the lost rows could be read; None for those whose could not.
    note : str
        Why the table could not be read at all, or "".
    """

    table: str
    rows: int | None
    copied: int
    unreadable_columns: tuple = ()
    lost_by_study: tuple = ()
    note: str = ""

    @property
    def lost(self) -> int | None:
        """Rows not copied (None when the damaged file's row count is unknown)."""
        return None if self.rows is None else max(self.rows - self.copied, 0)


@dataclass(frozen=True)
class SalvageReport:
    """What :func:`salvage_archive` copied, table by table."""

    damaged: str
    new: str
    archive_id: str | None
    tables: tuple = field(default_factory=tuple)

    @property
    def complete(self) -> bool:
        """True when every row of every table was copied."""
        return all(t.lost == 0 and not t.note for t in self.tables)

    def to_dict(self) -> dict:
        """Plain-data form, one entry per table (with its ``lost`` count)."""
        return {"damaged": self.damaged, "new": self.new, "archive_id": self.archive_id, "complete": self.complete,
                "tables": [{**asdict(t), "lost": t.lost, "unreadable_columns": list(t.unreadable_columns),
                            "lost_by_study": [list(p) for p in t.lost_by_study]} for t in self.tables]}

    def lines(self) -> list[str]:
        """A readable report, one line per table, then what was lost where."""
        out = [f"salvaged {self.damaged} into {self.new}"
               + (f" (archive id {self.archive_id} kept)" if self.archive_id else "")]
        for t in self.tables:
            total = "?" if t.rows is None else f"{t.rows:,}"
            line = f"  {t.table:<13} {t.copied:>10,} of {total:>10} rows copied"
            if t.note:
                line += f"; could not be read: {t.note}"
            elif t.lost:
                line += f"; {t.lost:,} could not be read"
                if t.unreadable_columns:
                    line += f" (damaged column(s): {', '.join(t.unreadable_columns)})"
            out.append(line)
            for study, n in t.lost_by_study[:10]:
                out.append(f"    {n:,} trial(s) of " + (f"study {study}" if study is not None else "studies whose id "
                                                         "cannot be read either") + " lost")
            if len(t.lost_by_study) > 10:
                out.append(f"    ... and {len(t.lost_by_study) - 10} more studies with lost trials")
        out.append("everything was copied: the damaged file read cleanly" if self.complete else
                   f"`warmstart --archive {self.new} curate check` lists what the lost rows leave behind "
                   "(e.g. trials of a study that could not be read)")
        return out


def _row_units(con: duckdb.DuckDBPyConnection, table: str) -> list[tuple[int, int]]:
    """Row-id ranges ``[lo, hi)`` that read whole or not at all: cut wherever a segment of any
    column starts or ends (``pragma_storage_info``: row groups in order, ``start`` counted
    within its row group) and at every vector of :data:`_VECTOR_ROWS` rows (a scan reads
    whole vectors: a row next to a damaged segment in the same vector cannot be read
    either). Without the segment list, pieces are vectors."""
    relation = f"{_ALIAS}.main.{table}"
    try:
        segments = fetch(con, "SELECT row_group_id, start, count FROM pragma_storage_info(?)", [relation])
        top = fetch(con, f"SELECT max(rowid) FROM {relation}")[0][0]
    except duckdb.Error:
        segments, top = [], None
    if segments:
        sizes: dict[int, int] = {}
        for group, start, count in segments:
            sizes[int(group)] = max(sizes.get(int(group), 0), int(start) + int(count))
        offset, starts = 0, {}
        for group in sorted(sizes):
            starts[group] = offset
            offset += sizes[group]
        cuts = {0, offset}
        for group, start, count in segments:
            cuts.update((starts[int(group)] + int(start), starts[int(group)] + int(start) + int(count)))
        for group, size in sizes.items():
            cuts.update(range(starts[group], starts[group] + size, _VECTOR_ROWS))
        edges = sorted(cuts)
        return [(lo, hi) for lo, hi in zip(edges[:-1], edges[1:]) if hi > lo]
    if top is None:
        return [(0, _VECTOR_ROWS)]
    return [(lo, min(lo + _VECTOR_ROWS, int(top) + 1)) for lo in range(0, int(top) + 1, _VECTOR_ROWS)]


def _copy_table(archive: Archive, table: str, columns: list[str],
                progress: Callable[[str, int, int], None] | None) -> tuple[int, list[tuple[int, int]]]:
    """Copy the readable rows of one table; returns (rows copied, row-id ranges that failed)."""
    con = archive.con
    names = ", ".join(quoted(c) for c in columns)
    insert = f"INSERT INTO {table} ({names}) SELECT {names} FROM {_ALIAS}.main.{table}"
    try:
        copied = int(fetch(con, insert)[0][0])  # one statement: all or nothing
        if progress:
            progress(table, 1, 1)
        return copied, []
    except duckdb.Error as exc:
        if fault_of(exc) != DAMAGED:
            raise
    units = _row_units(con, table)
    copied, failed = 0, []
    for done, (lo, hi) in enumerate(units, start=1):
        try:
            copied += int(fetch(con, insert + " WHERE rowid >= ? AND rowid < ?", [lo, hi])[0][0])
        except duckdb.Error as exc:
            if fault_of(exc) != DAMAGED:
                raise
            failed.append((lo, hi))
        if progress:
            progress(table, done, len(units))
    return copied, failed


def _lost_by_study(con: duckdb.DuckDBPyConnection, failed: list[tuple[int, int]]) -> tuple:
    """(study id, trials) among the row ranges that failed, where the study id can be read."""
    counts: dict[int | None, int] = {}
    for lo, hi in failed:
        try:
            rows = fetch(con, f"SELECT study_id, count(*) FROM {_ALIAS}.main.trials WHERE rowid >= ? AND rowid < ? "
                              "GROUP BY study_id", [lo, hi])
        except duckdb.Error:
            try:
                rows = [(None, fetch(con, f"SELECT count(*) FROM {_ALIAS}.main.trials WHERE rowid >= ? "
                                          "AND rowid < ?", [lo, hi])[0][0])]
            except duckdb.Error:
                rows = []
        for study, n in rows:
            key = None if study is None else int(study)
            counts[key] = counts.get(key, 0) + int(n)
    return tuple(sorted(counts.items(), key=lambda kv: (kv[0] is None, kv[0] or 0)))


def _salvage_table(archive: Archive, table: str, version: int | None, damaged_columns: dict[str, list[str]],
                   progress: Callable[[str, int, int], None] | None) -> TableSalvage | None:
    """Copy one table; None for a table the damaged file's (older) schema never had."""
    con = archive.con
    theirs = set(table_columns(con, _ALIAS, table))
    if not theirs:
        if version is not None and version < _ADDED_IN.get(table, 1):
            return None
        return TableSalvage(table, None, 0, note="the table is missing from the damaged file")
    try:
        rows = int(fetch(con, f"SELECT count(*) FROM {_ALIAS}.main.{table}")[0][0])
    except duckdb.Error:
        rows = None
    columns = [c for c in table_columns(con, fetch(con, "SELECT current_database()")[0][0], table) if c in theirs]
    if table == "archive_info":
        con.execute("DELETE FROM archive_info")  # the damaged archive's identity replaces the fresh one
    copied, failed = _copy_table(archive, table, columns, progress)
    lost = _lost_by_study(con, failed) if table == "trials" and failed else ()
    return TableSalvage(table, rows, copied, tuple(damaged_columns.get(table, ())), lost)


def _advance_sequences(archive: Archive) -> None:
    """Id sequences continue after the largest id copied (or handed out by the damaged archive)."""
    con = archive.con
    last = dict(fetch(con, "SELECT sequence_name, last_value FROM duckdb_sequences() WHERE database_name = ?",
                      [_ALIAS]))
    for table, (sequence, column) in _SEQUENCES.items():  # names from this module's allow-list and the schema
        top = fetch(con, f"SELECT coalesce(max({column}), 0) FROM {table}")[0][0]
        start = max(int(top), int(last.get(sequence) or 0)) + 1
        con.execute(f"DROP SEQUENCE {sequence}")
        con.execute(f"CREATE SEQUENCE {sequence} START {int(start)}")


def _check_paths(damaged: Path, new: Path) -> None:
    if not damaged.exists():
        raise ArchiveError(f"{damaged}: no such file; give the damaged archive file to salvage")
    if damaged.is_dir():
        raise ArchiveError(f"{damaged}: is a directory; give the damaged archive file to salvage")
    if new.exists() or new.is_symlink():
        raise ArchiveError(f"{new}: already exists; salvage writes a new archive and never overwrites, "
                           "give a path that does not exist yet")
    if not new.parent.is_dir():
        raise ArchiveError(f"{new}: the directory {new.parent} does not exist; create it first or give another path")


def _attach_damaged(con: duckdb.DuckDBPyConnection, damaged: Path) -> None:
    try:
        con.execute(f"ATTACH ? AS {_ALIAS} (READ_ONLY)", [str(damaged)])
    except duckdb.Error as exc:
        error = archive_error(exc, damaged, source=True)
        if isinstance(error, ArchiveDamagedError):
            raise ArchiveDamagedError(
                f"{damaged}: nothing can be read from it: DuckDB cannot open it ({first_line(exc)}); the damage is "
                "in the file's header or its table list. Restore the file from a backup; nothing was written"
            ) from None
        raise error or ArchiveError(f"{damaged}: cannot open it ({first_line(exc)}); nothing was written") from None


def _source_schema(con: duckdb.DuckDBPyConnection, damaged: Path) -> int | None:
    """The damaged file's schema version (None when it cannot be read); refuse a file
    that is not a warmstart archive, or of a newer schema."""
    try:
        tables = {r[0] for r in fetch(con, "SELECT table_name FROM information_schema.tables WHERE table_catalog = ? "
                                           "AND table_schema = 'main'", [_ALIAS])}
    except duckdb.Error as exc:
        if fault_of(exc) != DAMAGED:
            raise
        raise ArchiveDamagedError(
            f"{damaged}: nothing can be read from it: its list of tables is damaged ({first_line(exc)}). Restore the "
            "file from a backup; nothing was written") from None
    if not tables & set(ARCHIVE_TABLES):
        raise ArchiveError(f"{damaged}: not a warmstart archive (none of its tables is an archive table: "
                           f"{sorted(tables)[:8]}); nothing was written")
    try:
        version = fetch(con, f"SELECT max(version) FROM {_ALIAS}.main.schema_version")[0][0]
    except duckdb.Error:
        version = None  # unreadable or missing: copy the columns the two schemas share
    if version is not None and int(version) > SCHEMA_VERSION:
        raise ArchiveError(f"{damaged}: archive schema version {version} is newer than this warmstart understands "
                           f"({SCHEMA_VERSION}); upgrade warmstart to salvage it; nothing was written")
    return None if version is None else int(version)


def salvage_archive(damaged: str | Path, new: str | Path,
                    progress: Callable[[str, int, int], None] | None = None) -> SalvageReport:
    """Copy every table and row that can be read from a damaged archive into a new one.

    Parameters
    ----------
    damaged : str or Path
        The damaged archive file; attached read-only, never written.
    new : str or Path
        Where the new archive goes: must not exist, its directory must. It is
        built under a hidden name beside it and appears only when complete.
    progress : callable, optional
        Called as ``progress(table, done, total)`` in pieces copied.

    Returns
    -------
    SalvageReport
        Per table: rows in the damaged file, rows copied, damaged columns,
        and for trials the studies that lost some.

    Raises
    ------
    ArchiveError
        ``damaged`` is missing, not an archive, of a newer schema, held by a
        writer (:class:`ArchiveLockedError`), or cannot be opened at all
        (:class:`ArchiveDamagedError`); ``new`` exists or has no directory.
        Nothing is written then.
    """
    damaged, new = Path(damaged), Path(new)
    _check_paths(damaged, new)
    staging = new.parent / f".{new.name}.salvage-{uuid.uuid4().hex[:8]}"
    try:
        with Archive(staging) as archive, translated(damaged, source=True):  # the new file is sound
            _attach_damaged(archive.con, damaged)
            try:
                version = _source_schema(archive.con, damaged)
                broken: dict[str, list[str]] = {}
                for item in unreadable_columns(archive.con, ARCHIVE_TABLES, catalog=_ALIAS):
                    broken.setdefault(item.table, []).append(item.column)
                done = (_salvage_table(archive, t, version, broken, progress) for t in SALVAGED_TABLES)
                tables = tuple(t for t in done if t is not None)
                _advance_sequences(archive)
                archive_id = fetch(archive.con, "SELECT min(archive_id) FROM archive_info")[0][0]
                kept = archive_id if tables[0].copied else None
                if not tables[0].copied:  # the damaged archive's id is lost: the new one keeps a fresh id
                    archive.con.execute("INSERT INTO archive_info SELECT ?, now()::TIMESTAMP WHERE NOT EXISTS "
                                        "(SELECT 1 FROM archive_info)", [uuid.uuid4().hex])
            finally:
                archive.con.execute(f"DETACH DATABASE IF EXISTS {_ALIAS}")
        _publish(staging, new)
    finally:
        for leftover in (staging, staging.with_name(staging.name + ".wal")):
            leftover.unlink(missing_ok=True)
    return SalvageReport(str(damaged), str(new), kept, tables)


def _publish(staging: Path, new: Path) -> None:
    """Give the finished archive its name, never replacing a file made there meanwhile."""
    try:
        os.link(staging, new)  # fails if ``new`` exists
    except FileExistsError:
        raise ArchiveError(f"{new}: was created by something else while salvaging; nothing was replaced") from None
    except OSError:  # a file system without hard links
        if new.exists():
            raise ArchiveError(f"{new}: was created by something else while salvaging; nothing was replaced") from None
        os.replace(staging, new)
