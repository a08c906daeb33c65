"""Export the archive to a partitioned Parquet store, and import such a store.

An export is a directory a teammate or DuckDB can read in place (layout in
:func:`export_archive`); an import checks the store against its manifest and
the archive's constraints, then merges it with the rules of
:mod:`warmstart.archive.merge` (one transaction, no duplicate trials).
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Callable

import duckdb

from warmstart._version import __version__
from warmstart.archive.faults import DAMAGED, damaged_error, damaged_file, fault_of, first_line
from warmstart.archive.merge import MergeSource, MergeSummary, merge_from
from warmstart.archive.sql import fetch
from warmstart.archive.store import DATA_TABLES, SCHEMA_VERSION, Archive, utc_now
from warmstart.errors import ArchiveError

__all__ = ["export_archive", "import_export", "EXPORT_FORMAT"]

EXPORT_FORMAT = "warmstart-export"
_ORDER = {"tasks": "task_id", "profiles": "task_id, feature", "spaces": "space_id", "studies": "study_id"}


def export_archive(archive: Archive, directory: str | Path,
                   progress: Callable[[int, int], None] | None = None) -> dict:
    """Write the archive as a partitioned Parquet store plus a manifest.

    Layout of ``directory`` (created; it must not exist or be empty)::

        manifest.json        format, schema version, archive id, counts, versions
        tasks.parquet  profiles.parquet  spaces.parquet  studies.parquet
        trials/learner=<learner>/data_0.parquet   (hive partitions)

    Trial files hold every trial column plus the identity of its study:
    ``task``, ``fingerprint``, ``space_hash``, ``metric``, ``direction``
    (``learner`` is in the partition path). The store is written into a
    hidden sibling directory and renamed into place when complete, so a
    crash never leaves a half export under ``directory``.

    ``progress(done, total)``, when given, is called before the first table
    and after each of the five tables is written (the trials last: the
    longest step).

    Returns
    -------
    dict
        The manifest.
    """
    target = Path(directory)
    staging = _staging_directory(target)
    try:
        counts, left_out = _write_tables(archive.con, staging, progress)
        manifest = {
            "format": EXPORT_FORMAT,
            "schema_version": archive.schema_version,
            "archive_id": archive.archive_id,
            "exported_at": utc_now().isoformat(),
            "warmstart_version": __version__,
            "duckdb_version": duckdb.__version__,
            "partitioned_by": ["learner"],
            "counts": counts,
            "orphan_trials_left_out": left_out,
            "files": {**{t: f"{t}.parquet" for t in ("tasks", "profiles", "spaces", "studies")},
                      "trials": "trials/learner=*/*.parquet"},
        }
        (staging / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
        os.replace(staging, target)
    except BaseException as exc:
        shutil.rmtree(staging, ignore_errors=True)
        if isinstance(exc, duckdb.Error):
            if fault_of(exc) == DAMAGED:
                raise damaged_error(damaged_file(exc) or archive.path,
                                    f"DuckDB: {first_line(exc)}; nothing was exported") from None
            raise ArchiveError(f"{target}: export failed ({first_line(exc)}); nothing was written there") from None
        if isinstance(exc, OSError):
            raise ArchiveError(f"{target}: export failed ({exc.strerror or exc}); nothing was written there") from None
        raise
    return manifest


def _staging_directory(target: Path) -> Path:
    """A new hidden directory beside ``target`` to write the store into; refuses a
    ``target`` that is a file or a directory with something in it."""
    if target.exists() and not target.is_dir():
        raise ArchiveError(f"{target}: already exists and is a file; give a new directory to export to")
    if target.exists() and any(target.iterdir()):
        raise ArchiveError(
            f"{target}: already exists and is not an empty directory; export never overwrites, give a new directory"
        )
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        return Path(tempfile.mkdtemp(prefix=".warmstart-export-", dir=target.parent))
    except OSError as exc:
        raise ArchiveError(f"{target}: cannot create the export directory ({exc.strerror})") from None


def _write_tables(con: duckdb.DuckDBPyConnection, staging: Path,
                  progress: Callable[[int, int], None] | None = None) -> tuple[dict[str, int], int]:
    """Write the four small tables and the partitioned trials into ``staging``; returns
    the row counts written and the number of orphan trials (no study) left out."""
    step = progress or (lambda done, total: None)
    counts = {}
    step(0, 5)
    for k, table in enumerate(("tasks", "profiles", "spaces", "studies"), start=1):
        con.execute(
            f"COPY (SELECT * FROM {table} ORDER BY {_ORDER[table]}) TO ? (FORMAT parquet)",
            [str(staging / f"{table}.parquet")],
        )
        counts[table] = int(fetch(con, f"SELECT count(*) FROM {table}")[0][0])
        step(k, 5)
    (staging / "trials").mkdir()
    # Partitioned writes buffer up to this many rows per thread before flushing: the
    # default (524,288) took 1.3 GB for 1.5M trials, 65,536 about 0.45 GB at the same speed.
    con.execute("SET partitioned_write_flush_threshold = 65536")
    try:
        con.execute(
            "COPY (SELECT s.learner, t.study_id, t.number, t.config, t.score, t.status, t.cost_s, t.started_at, "
            "t.finished_at, t.error, t.content_key, k.name AS task, k.fingerprint, p.content_hash AS space_hash, "
            "s.metric, s.direction FROM trials t JOIN studies s ON s.study_id = t.study_id "
            "LEFT JOIN tasks k ON k.task_id = s.task_id LEFT JOIN spaces p ON p.space_id = s.space_id "
            ") TO ? (FORMAT parquet, PARTITION_BY (learner), OVERWRITE_OR_IGNORE)",
            [str(staging / "trials")],
        )
    finally:
        con.execute("RESET partitioned_write_flush_threshold")
    counts["trials"], left_out = (int(x) for x in fetch(
        con,
        "SELECT count(*) FILTER (WHERE study_id IN (SELECT study_id FROM studies)), "
        "count(*) FILTER (WHERE study_id NOT IN (SELECT study_id FROM studies)) FROM trials",
    )[0])
    step(5, 5)
    return counts, left_out


def _read_manifest(directory: Path) -> dict:
    path = directory / "manifest.json"
    if not path.is_file():
        raise ArchiveError(
            f"{directory}: no manifest.json here; give a directory written by `warmstart curate export`"
        )
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (ValueError, UnicodeDecodeError) as exc:
        raise ArchiveError(f"{path}: not valid JSON ({first_line(exc)})") from None
    if not isinstance(manifest, dict) or manifest.get("format") != EXPORT_FORMAT:
        found = manifest.get("format") if isinstance(manifest, dict) else type(manifest).__name__
        raise ArchiveError(f"{path}: not a warmstart export manifest (format {found!r}, expected {EXPORT_FORMAT!r})")
    version = manifest.get("schema_version")
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise ArchiveError(f"{path}: schema_version {version!r} is not a whole number >= 1")
    if version > SCHEMA_VERSION:
        raise ArchiveError(
            f"{path}: the export is of archive schema version {version}, newer than this warmstart understands "
            f"({SCHEMA_VERSION}); upgrade warmstart to import it; nothing was changed"
        )
    if version < SCHEMA_VERSION:
        raise ArchiveError(
            f"{path}: the export is of archive schema version {version}; this warmstart imports version "
            f"{SCHEMA_VERSION} only"
        )
    source_id = manifest.get("archive_id")
    if not isinstance(source_id, str) or not source_id:
        raise ArchiveError(f"{path}: archive_id {source_id!r} is missing or not a string")
    counts = manifest.get("counts")
    if not isinstance(counts, dict) or any(
        isinstance(counts.get(t), bool) or not isinstance(counts.get(t), int) or counts.get(t) < 0 for t in DATA_TABLES
    ):
        raise ArchiveError(f"{path}: counts must give a whole number of rows for each of {list(DATA_TABLES)}; got {counts!r}")
    return manifest


def _columns(con: duckdb.DuckDBPyConnection, table: str) -> list[str]:
    """Columns of one of our tables (``table`` from the allow-list)."""
    return [d[0] for d in con.execute(f"SELECT * FROM {table} LIMIT 0").description]


# values the schema's CHECK constraints allow (schema_v1.sql)
# columns an export may lack (written before the schema had them): they arrive empty
_OPTIONAL = {("trials", "fold_scores")}

_ALLOWED = {
    ("tasks", "kind"): ("classification", "regression"),
    ("studies", "direction"): ("maximize", "minimize"),
    ("studies", "origin"): ("cold", "warm", "imported"),
    ("trials", "status"): ("ok", "failed"),
}


_ROW_NAME = {"tasks": "task", "profiles": "profile value", "spaces": "space", "studies": "study", "trials": "trial"}


def _check_rows(con: duckdb.DuckDBPyConnection, table: str, name: str, where: Path) -> None:
    """Refuse, naming the file, column and value, what the archive's constraints
    would refuse only when the rows are inserted (missing required values and
    values outside a CHECK list); ``table`` is one of ours, ``name`` a
    registered relation."""
    required = [r[0] for r in con.execute(
        "SELECT column_name FROM information_schema.columns WHERE table_name = ? AND is_nullable = 'NO' "
        "AND table_schema = current_schema() ORDER BY ordinal_position", [table]).fetchall()]
    for column in required:
        n = con.execute(f'SELECT count(*) FROM {name} WHERE "{column}" IS NULL').fetchall()[0][0]
        if n:
            raise ArchiveError(f"{where}: column {column!r} is empty on {n} row(s); every {_ROW_NAME.get(table, 'row')} needs it; "
                               "nothing was changed")
    for (tab, column), allowed in _ALLOWED.items():
        if tab != table:
            continue
        bad = con.execute(
            f'SELECT "{column}", count(*) FROM {name} WHERE "{column}" IS NOT NULL '
            f'AND NOT list_contains(?, "{column}") GROUP BY 1 ORDER BY 2 DESC LIMIT 1', [list(allowed)]).fetchall()
        if bad:
            bad = bad[0]
            raise ArchiveError(f"{where}: column {column!r} holds {bad[0]!r} on {bad[1]} row(s); valid values are "
                               f"{list(allowed)}; nothing was changed")


def import_export(archive: Archive, directory: str | Path, progress: Callable[[str], None] | None = None) -> MergeSummary:
    """Import a store written by :func:`export_archive`: a merge, same rules.

    Raises
    ------
    ArchiveError
        The directory, its manifest or one of its files is missing, not
        readable, incomplete (counts differ from the manifest) or from a newer
        schema; the message names the file. Nothing is changed then.
    """
    d = Path(directory)
    if not d.exists():
        raise ArchiveError(f"{d}: no such directory; give a directory written by `warmstart curate export`")
    if not d.is_dir():
        raise ArchiveError(
            f"{d}: is a file, not an export directory; to merge an archive file use `warmstart curate merge`"
        )
    manifest = _read_manifest(d)
    if archive.read_only:
        raise ArchiveError(f"{archive.path}: opened read-only; cannot import into it")
    con = archive.con
    registered: list[str] = []
    try:
        relations = {}
        for table in DATA_TABLES:
            if table == "trials":
                files = sorted(str(f) for f in (d / "trials").rglob("*.parquet")) if (d / "trials").is_dir() else []
                where = d / "trials"
                if not files and manifest["counts"]["trials"]:
                    raise ArchiveError(f"{where}: no Parquet files, but the manifest lists {manifest['counts']['trials']} trials")
            else:
                where = d / f"{table}.parquet"
                if not where.is_file():
                    raise ArchiveError(f"{where}: missing; the export is incomplete")
                files = [str(where)]
            need = _columns(con, table)
            if files:
                try:
                    rel = con.read_parquet(files, hive_partitioning=False, union_by_name=True)
                    n = int(rel.aggregate("count(*)").fetchall()[0][0])
                except duckdb.Error as exc:
                    raise ArchiveError(f"{where}: not a readable Parquet file ({first_line(exc)})") from None
                lacking = [c for c in need if c not in rel.columns and (table, c) not in _OPTIONAL]
                if lacking:
                    raise ArchiveError(f"{where}: column(s) {lacking} missing; expected {need}")
            else:
                rel, n = con.sql(f"SELECT * FROM {table} LIMIT 0"), 0
            if n != manifest["counts"][table]:
                raise ArchiveError(
                    f"{where}: {n} {table} rows, but the manifest says {manifest['counts'][table]}; the export is "
                    "incomplete or was changed"
                )
            name = f"_ws_import_{table}"
            con.register(name, rel)
            registered.append(name)
            relations[table] = name
            _check_rows(con, table, name, where)
        src = MergeSource(relations, manifest["archive_id"], str(d))
        return merge_from(archive, src, progress)
    finally:
        for name in registered:
            con.unregister(name)
