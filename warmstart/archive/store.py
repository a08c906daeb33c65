"""The archive: one DuckDB file holding every task, profile, space, study and trial.

Rules kept here:

- every value from outside goes through a ``?`` placeholder; identifiers come
  only from this module;
- every logical write is one transaction (:meth:`Archive.transaction`), so a
  crash leaves the archive as it was before or after, never between;
- one process writes, others read (DuckDB's file lock); a second writer gets
  :class:`~warmstart.errors.ArchiveLockedError` naming the file and the fix;
- a damaged file (cut short, or a block failing DuckDB's checksum) gets
  :class:`~warmstart.errors.ArchiveDamagedError` naming the file and the fix
  (``warmstart curate salvage``); it is never written: a file cut short is
  refused on opening, and every block is read before a write opening.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import uuid
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterator, Mapping, Sequence

import duckdb

from warmstart.archive.faults import archive_error, check_blocks, damaged_error, first_line, translated
from warmstart.archive.location import DEFAULT_ARCHIVE, default_archive_path
from warmstart.errors import ArchiveError

if TYPE_CHECKING:
    import pandas as pd

    from warmstart.space import Space

# numpy, pandas and the modules that need them (space, ingest) are imported where a method uses
# them: opening an archive and listing its studies (`warmstart studies`) stay quick.

__all__ = [
    "Archive", "SCHEMA_VERSION", "DEFAULT_ARCHIVE", "ARCHIVE_TABLES", "DATA_TABLES", "default_archive_path",
    "fingerprint", "utc_now",
]

SCHEMA_VERSION = 3
MIGRATIONS = {1: "schema_v1.sql", 2: "schema_v2.sql", 3: "schema_v3.sql"}  # version -> DDL that brings version-1 to version
#: oldest schema a read-only open accepts: version 2 only adds the service's tables (leases,
#: request ids, gain reports), which no reader outside the service touches; version 3 adds
#: trials.fold_scores, which a reader of an older file sees as missing (:meth:`Archive.trials`)
READABLE_FROM = 1
#: every table of the archive (schema_v1.sql, schema_v2.sql, schema_v3.sql), the allow-list of table names used in statements
ARCHIVE_TABLES = ("schema_version", "archive_info", "tasks", "profiles", "spaces", "studies", "trials",
                  "leases", "requests", "gain_reports")
#: the tables that hold history (what a merge, an export and an import carry); the service's
#: tables (leases, requests, gain_reports) are promises and records of the one service that owns
#: an archive, so they stay with it and are never carried (tests/test_cli_archive.py checks it)
DATA_TABLES = ("tasks", "profiles", "spaces", "studies", "trials")


def utc_now() -> datetime:
    """Now in UTC, as a naive datetime (how the archive stores times)."""
    return datetime.now(timezone.utc).replace(tzinfo=None)


def fingerprint(frame: pd.DataFrame, target: str) -> str:
    """Content hash of a dataset and its target column (SHA-256, hex).

    Row order matters; the index does not. Uses pandas' vectorised row
    hashing, so a million rows take well under a second.
    """
    import pandas as pd

    h = hashlib.sha256()
    h.update(json.dumps([str(c) for c in frame.columns]).encode())
    h.update(json.dumps([str(t) for t in frame.dtypes]).encode())
    h.update(str(target).encode())
    h.update(pd.util.hash_pandas_object(frame, index=False).to_numpy().tobytes())
    return h.hexdigest()


class Archive:
    """The DuckDB archive of tuning history.

    Parameters
    ----------
    path : str or Path, default ``default_archive_path()``
        Archive file; ``":memory:"`` for a throw-away archive. A missing file
        is created with the current schema (unless ``read_only``).
    read_only : bool, default False
        Open for reading only (several readers may share a file).

    Raises
    ------
    ArchiveError
        The file is not a DuckDB database, not a warmstart archive, or comes
        from a newer warmstart.
    ArchiveLockedError
        Another process holds the file for writing.
    ArchiveDamagedError
        The file is cut short, or (when opened for writing: every block is
        read first, under a second per million trials) a block fails its checksum.

    Examples
    --------
    >>> archive = Archive(":memory:")
    >>> archive.studies().shape[0]
    0
    """

    def __init__(self, path: str | Path | None = None, read_only: bool = False):
        path = default_archive_path() if path is None else path
        self.path = str(path)
        self.read_only = read_only
        self._depth = 0
        self._heads: dict[int, tuple[int, str, str, str]] = {}
        self._spaces: dict[int, Space] = {}
        memory = self.path == ":memory:"
        if not memory:
            p = Path(self.path)
            if p.is_dir():
                raise ArchiveError(f"{self.path}: is a directory; give the archive file, e.g. {p / 'warmstart.duckdb'}")
            if read_only and not p.exists():
                raise ArchiveError(f"{self.path}: no archive here; create one with `warmstart init`")
            if not read_only:
                p.parent.mkdir(parents=True, exist_ok=True)
            if p.is_file() and p.stat().st_size >= 12:
                with open(p, "rb") as fh:
                    head = fh.read(12)
                if head[8:12] != b"DUCK":  # DuckDB's file magic sits at bytes 8-11 of the header
                    raise ArchiveError(
                        f"{self.path}: not a warmstart archive (the file is not a DuckDB database); "
                        "give another --archive path or move this file away"
                    )
        try:
            self.con = duckdb.connect(self.path, read_only=read_only)
        except duckdb.Error as exc:
            raise archive_error(exc, self.path) or ArchiveError(
                f"{self.path}: cannot open the archive: {first_line(exc)}") from None
        try:
            with translated(self.path):
                self._check_not_cut_short()
                # DuckDB's own progress bar prints to stdout on long queries and would corrupt --json output.
                self.con.execute("SET enable_progress_bar = false")
                if not read_only and not memory:
                    # nothing is written into a damaged file: every block is read first
                    check_blocks(self.con, self.path, ARCHIVE_TABLES)
                self._check_schema()
        except BaseException:
            self.con.close()
            raise

    # -- lifecycle ---------------------------------------------------------
    def close(self) -> None:
        """Close the connection (idempotent)."""
        with contextlib.suppress(duckdb.Error):
            self.con.close()

    def __enter__(self) -> "Archive":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.read_only else "read-write"
        return f"Archive({self.path!r}, {mode})"

    def reader(self) -> "Archive":
        """A read-only view of this open archive on a cursor of its own.

        For another thread of the same process (DuckDB: one connection per
        process, a cursor per thread): it sees every committed write and
        refuses to write. Close it when the thread is done with it.
        """
        view = object.__new__(Archive)
        view.path, view.read_only, view._depth = self.path, True, 0
        view._heads, view._spaces = {}, {}
        view.con = self.con.cursor()
        return view

    @contextlib.contextmanager
    def transaction(self) -> Iterator[duckdb.DuckDBPyConnection]:
        """One transaction for a logical write; nested uses join the outer one."""
        if self.read_only:
            raise ArchiveError(f"{self.path}: opened read-only; cannot write")
        if self._depth:
            self._depth += 1
            try:
                yield self.con
            finally:
                self._depth -= 1
            return
        self.con.begin()
        self._depth = 1
        try:
            yield self.con
        except BaseException:
            self._depth = 0
            with contextlib.suppress(duckdb.Error):
                self.con.rollback()
            raise
        self._depth = 0
        self.con.commit()

    def _q(self, sql: str, params: Any = None) -> list[tuple]:
        with translated(self.path):
            return self.con.execute(sql, params or []).fetchall()

    def _df(self, sql: str, params: Any = None) -> pd.DataFrame:
        with translated(self.path):  # DuckDB imports pandas for .df()
            return self.con.execute(sql, params or []).df()

    def _check_not_cut_short(self) -> None:
        """Refuse a file shorter than the blocks DuckDB's own header says it holds.

        A file cut short (a full disk, an interrupted copy) opens, and fails
        only when a command reads a missing block; this check costs one query
        and makes every command refuse it at once. Blocks in use never overlap,
        so a sound file is at least ``used_blocks * block_size`` bytes long
        (free blocks beyond the end are not counted: DuckDB may cut them off).
        """
        if self.path == ":memory:":
            return
        block_size, used = self.con.execute("SELECT block_size, used_blocks FROM pragma_database_size()").fetchone()
        size = os.path.getsize(self.path)
        if size < int(block_size) * int(used):
            raise damaged_error(
                self.path, f"the file is {size:,} bytes but its header counts {int(used):,} blocks of "
                f"{int(block_size):,} bytes in use ({int(block_size) * int(used):,} bytes): it was cut short, "
                "e.g. by a full disk or an interrupted copy")

    # -- schema ------------------------------------------------------------
    def _existing_tables(self) -> set[str]:
        rows = self._q("SELECT table_name FROM information_schema.tables WHERE table_schema = 'main'")
        return {r[0] for r in rows}

    def _check_schema(self) -> None:
        tables = self._existing_tables()
        if not tables:
            if self.read_only:
                raise ArchiveError(f"{self.path}: empty database, not a warmstart archive; create one with `warmstart init`")
            self._migrate(0)
            return
        if "schema_version" not in tables:
            raise ArchiveError(
                f"{self.path}: a DuckDB database but not a warmstart archive (no schema_version table; "
                f"tables: {sorted(tables)[:8]}); give another --archive path"
            )
        version = self.schema_version
        if version > SCHEMA_VERSION:
            raise ArchiveError(
                f"{self.path}: archive schema version {version} is newer than this warmstart "
                f"understands ({SCHEMA_VERSION}); upgrade warmstart to open it"
            )
        if version < SCHEMA_VERSION:
            if self.read_only:
                if version >= READABLE_FROM:
                    return
                raise ArchiveError(
                    f"{self.path}: archive schema version {version} needs migrating to {SCHEMA_VERSION}; "
                    "open it once for writing (any write command) to migrate"
                )
            self._migrate(version)

    @property
    def schema_version(self) -> int:
        """Schema version recorded in the archive."""
        row = self._q("SELECT max(version) FROM schema_version")
        return int(row[0][0] or 0)

    def _migrate(self, current: int) -> None:
        with self.transaction() as con:
            for version in range(current + 1, SCHEMA_VERSION + 1):
                sql = resources.files("warmstart.archive").joinpath(MIGRATIONS[version]).read_text()
                for statement in _split_sql(sql):
                    con.execute(statement)
                con.execute(
                    "INSERT INTO schema_version VALUES (?, ?, ?)", [version, utc_now(), duckdb.__version__]
                )
            if current == 0:
                con.execute("INSERT INTO archive_info VALUES (?, ?)", [uuid.uuid4().hex, utc_now()])

    @property
    def archive_id(self) -> str:
        """Random id given to the archive at creation (used as merge provenance)."""
        return self._q("SELECT archive_id FROM archive_info LIMIT 1")[0][0]

    # -- tasks -------------------------------------------------------------
    def add_task(
        self,
        name: str,
        frame: pd.DataFrame,
        target: str,
        kind: str | None = None,
        source: str | None = None,
        profile: Mapping[str, float] | None = None,
    ) -> int:
        """Add a task (dataset + target) with its fingerprint and profile.

        A task with the same name and fingerprint is reused (its id is
        returned); the same name with other data is an error.

        Parameters
        ----------
        name : str
            Task name, stored verbatim.
        frame : pandas.DataFrame
            The dataset, target column included.
        target : str
            Target column.
        kind : {"classification", "regression"}, optional
            Detected from the target when not given.
        source : str, optional
            Where the data came from (a file name), for the record.
        profile : mapping, optional
            A profile computed earlier with :func:`warmstart.profile`.

        Returns
        -------
        int
            The task id.
        """
        from warmstart.profile import PROFILE_VERSION, detect_kind
        from warmstart.profile import profile as compute_profile

        if not isinstance(name, str) or not name.strip():
            raise ArchiveError(f"task name must be a non-empty string, got {name!r}")
        if target not in frame.columns:
            raise ArchiveError(f"task {name!r}: target column {target!r} not found; columns are {list(frame.columns)}")
        fp = fingerprint(frame, target)
        same = self._q("SELECT task_id FROM tasks WHERE name = ? AND fingerprint = ?", [name, fp])
        taken = bool(self._q("SELECT 1 FROM tasks WHERE name = ?", [name]))
        stale = bool(same) and self._profile_version(same[0][0]) != PROFILE_VERSION
        kind = kind or detect_kind(frame[target])
        if profile is None and (not taken or stale):
            profile = compute_profile(frame, target=target, kind=kind)
        return self.register_task(name, fp, kind, target, int(frame.shape[0]), int(frame.shape[1] - 1), profile,
                                  source=source)

    def register_task(
        self,
        name: str,
        fingerprint: str,
        kind: str,
        target: str,
        n_rows: int | None,
        n_features: int | None,
        profile: Mapping[str, float] | None,
        source: str | None = None,
    ) -> int:
        """Add a task known by its fingerprint and profile, without its data.

        What :meth:`add_task` does once it has hashed and profiled the data;
        the team service calls it with what a client computed locally. A task
        with the same name and fingerprint is reused (its profile rewritten
        when it is of another version); the same name with another
        fingerprint is an error.

        Parameters
        ----------
        name : str
            Task name, stored verbatim.
        fingerprint : str
            :func:`fingerprint` of the data and target.
        kind : {"classification", "regression"}
        target : str
            Target column name.
        n_rows, n_features : int or None
            Size of the data (features exclude the target).
        profile : mapping or None
            Profile of :data:`~warmstart.profile.PROFILE_VERSION`; needed for a
            new task or one whose stored profile is of another version.
        source : str, optional
            Where the data came from, for the record.

        Returns
        -------
        int
            The task id.
        """
        from warmstart.profile import PROFILE_VERSION

        if not isinstance(name, str) or not name.strip():
            raise ArchiveError(f"task name must be a non-empty string, got {name!r}")
        if kind not in ("classification", "regression"):
            raise ArchiveError(f"task {name!r}: kind must be classification or regression, got {kind!r}")
        found = self._q("SELECT task_id, fingerprint FROM tasks WHERE name = ?", [name])
        for task_id, other in found:
            if other == fingerprint:
                if self._profile_version(task_id) != PROFILE_VERSION:
                    if profile is None:
                        raise ArchiveError(f"task {name!r}: its stored profile is outdated; give a profile of "
                                           f"version {PROFILE_VERSION}")
                    with self.transaction():
                        self._write_profile(task_id, profile, PROFILE_VERSION)
                return int(task_id)
        if found:
            raise ArchiveError(
                f"task {name!r} already exists in {self.path} with different data "
                f"(fingerprint {found[0][1][:12]} vs {fingerprint[:12]}); choose another task name (tune and ingest take --task)"
            )
        if profile is None:
            raise ArchiveError(f"task {name!r} is new: give its profile (version {PROFILE_VERSION})")
        with self.transaction() as con:
            task_id = con.execute("SELECT nextval('task_ids')").fetchall()[0][0]
            con.execute(
                "INSERT INTO tasks VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [task_id, name, fingerprint, kind, target, n_rows, n_features, utc_now(), source],
            )
            self._write_profile(task_id, profile, PROFILE_VERSION)
        return int(task_id)

    def _profile_version(self, task_id: int) -> str | None:
        row = self._q("SELECT min(version) FROM profiles WHERE task_id = ?", [task_id])
        return row[0][0]

    def _write_profile(self, task_id: int, prof: Mapping[str, float], version: str) -> None:
        values = {str(k): float(v) for k, v in prof.items()}
        bad = [k for k, v in values.items() if not math.isfinite(v)]
        if bad:
            raise ArchiveError(f"profile of task {task_id} has non-finite value(s) for {bad}")
        import pandas as pd

        frame = pd.DataFrame(
            {"task_id": task_id, "feature": list(values), "value": list(values.values()), "version": version}
        )
        with self.transaction() as con:
            con.execute("DELETE FROM profiles WHERE task_id = ?", [task_id])
            _insert_frame(con, "profiles", frame, ["task_id", "feature", "value", "version"])

    def task_id(self, name: str) -> int:
        """Id of the task called ``name`` (error listing known names if none)."""
        rows = self._q("SELECT task_id FROM tasks WHERE name = ? ORDER BY task_id", [name])
        if not rows:
            names = [r[0] for r in self._q("SELECT name FROM tasks ORDER BY name LIMIT 20")]
            raise ArchiveError(f"no task named {name!r} in {self.path}; known tasks include {names}")
        return int(rows[0][0])

    def tasks(self) -> pd.DataFrame:
        """All tasks, one row each."""
        return self._df(
            "SELECT task_id, name, fingerprint, kind, target, n_rows, n_features, created_at, source "
            "FROM tasks ORDER BY task_id"
        )

    def profiles(self) -> pd.DataFrame:
        """Profiles as a wide table: index task_id, one column per meta-feature,
        plus ``profile_version``."""
        import pandas as pd

        long = self._df("SELECT task_id, feature, value, version FROM profiles")
        if long.empty:
            return pd.DataFrame(index=pd.Index([], name="task_id", dtype="int64"))
        wide = long.pivot(index="task_id", columns="feature", values="value")
        wide.columns.name = None
        wide["profile_version"] = long.groupby("task_id")["version"].min()
        return wide.sort_index()

    def profile_of(self, task: int) -> dict[str, float]:
        """The stored profile of one task (meta-feature name -> value)."""
        rows = self._q("SELECT feature, value FROM profiles WHERE task_id = ? ORDER BY feature", [int(task)])
        if not rows:
            raise ArchiveError(f"task {task} has no profile in {self.path}")
        return {str(name): float(value) for name, value in rows}

    # -- spaces and studies ------------------------------------------------
    def _space_id(self, learner: str, space: Space) -> int:
        h = space.content_hash
        rows = self._q("SELECT space_id FROM spaces WHERE learner = ? AND content_hash = ?", [learner, h])
        if rows:
            return int(rows[0][0])
        with self.transaction() as con:
            space_id = con.execute("SELECT nextval('space_ids')").fetchall()[0][0]
            con.execute(
                "INSERT INTO spaces VALUES (?, ?, ?, ?)",
                [space_id, learner, json.dumps({"params": space.to_dict()["params"]}), h],  # keeps order
            )
        return int(space_id)

    def space(self, space_id: int) -> Space:
        """The space stored under ``space_id``."""
        rows = self._q("SELECT definition, learner FROM spaces WHERE space_id = ?", [space_id])
        if not rows:
            raise ArchiveError(f"no space with id {space_id} in {self.path}")
        d = json.loads(rows[0][0])
        d["learner"] = rows[0][1]
        from warmstart.space import Space

        return Space.from_dict(d, where=f"space {space_id}")

    def add_study(
        self,
        task: int,
        learner: str,
        space: Space,
        metric: str = "score",
        maximize: bool = True,
        origin: str = "cold",
        prior: Mapping | None = None,
        owner: str | None = None,
        tags: Mapping[str, str] | None = None,
    ) -> int:
        """Add a study of ``learner`` on task id ``task`` over ``space``.

        Returns
        -------
        int
            The study id.
        """
        if not isinstance(learner, str) or not learner.strip():
            raise ArchiveError(f"learner must be a non-empty string, got {learner!r}")
        if origin not in ("cold", "warm", "imported"):
            raise ArchiveError(f"origin must be one of cold, warm, imported; got {origin!r}")
        if not self._q("SELECT 1 FROM tasks WHERE task_id = ?", [int(task)]):
            raise ArchiveError(f"no task with id {task} in {self.path}")
        tags = {str(k): str(v) for k, v in (tags or {}).items()}
        with self.transaction() as con:
            space_id = self._space_id(learner, space)
            study_id = con.execute("SELECT nextval('study_ids')").fetchall()[0][0]
            con.execute(
                "INSERT INTO studies (study_id, task_id, learner, space_id, metric, direction, origin, prior, "
                "created_at, owner, tags) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [
                    study_id, int(task), learner, space_id, metric,
                    "maximize" if maximize else "minimize", origin,
                    None if prior is None else json.dumps(prior, sort_keys=True),
                    utc_now(), owner, json.dumps(tags, sort_keys=True),
                ],
            )
        return int(study_id)

    def finish_study(self, study: int) -> None:
        """Mark a study finished now."""
        with self.transaction() as con:
            con.execute("UPDATE studies SET finished_at = ? WHERE study_id = ?", [utc_now(), int(study)])

    _STUDY_SQL = (
        "SELECT s.study_id, s.task_id, t.name AS task, s.learner, s.space_id, s.metric, s.direction, "
        "s.origin, coalesce(r.trial_count, 0) AS trial_count, coalesce(r.n_ok, 0) AS n_ok, "
        "CASE WHEN s.direction = 'maximize' THEN r.best_max ELSE r.best_min END AS best_score, "
        "s.created_at, s.finished_at, s.owner, s.tags, s.prior "
        "FROM studies s LEFT JOIN tasks t ON t.task_id = s.task_id "
        "LEFT JOIN (SELECT study_id, count(*) AS trial_count, count(score) AS n_ok, max(score) AS best_max, "
        "min(score) AS best_min FROM trials GROUP BY study_id) r ON r.study_id = s.study_id"
    )

    def studies(self) -> pd.DataFrame:
        """One row per study with its task name, learner, metric, trial count and best score."""
        frame = self._df(self._STUDY_SQL + " ORDER BY s.study_id").drop(columns=["prior"])
        frame["tags"] = [json.loads(t) if isinstance(t, str) else {} for t in frame["tags"]]
        return frame

    def _records(self, sql: str, params: Any = None) -> list[dict]:
        """Rows of one statement as dicts keyed by column name (no pandas)."""
        with translated(self.path):
            cursor = self.con.execute(sql, params or [])
            names = [d[0] for d in cursor.description]
            return [dict(zip(names, row)) for row in cursor.fetchall()]

    def study_rows(self) -> list[dict]:
        """The rows of :meth:`studies` as plain dicts (no pandas: quick listings).

        A study without successful trials has ``best_score`` None; ``tags``
        is a dict.
        """
        rows = self._records(self._STUDY_SQL + " ORDER BY s.study_id")
        for row in rows:
            del row["prior"]
            row["tags"] = json.loads(row["tags"]) if isinstance(row["tags"], str) else {}
        return rows

    def study(self, study: int) -> dict:
        """One study as a dict, with its ``space`` (Space) and ``prior`` (dict or None).

        ``best_score`` is NaN when no trial succeeded.
        """
        rows = self._records(self._STUDY_SQL + " WHERE s.study_id = ?", [int(study)])
        if not rows:
            raise ArchiveError(f"no study with id {study} in {self.path}; `warmstart studies` lists them")
        row = rows[0]
        if row["best_score"] is None:
            row["best_score"] = float("nan")
        row["tags"] = json.loads(row["tags"]) if isinstance(row["tags"], str) else {}
        row["prior"] = json.loads(row["prior"]) if isinstance(row["prior"], str) else None
        row["space"] = self.space(int(row["space_id"]))
        row["maximize"] = row["direction"] == "maximize"
        return row

    # -- trials ------------------------------------------------------------
    def _study_keys(self, study: int) -> tuple[Space, str, str]:
        rows = self._q(
            "SELECT s.space_id, t.fingerprint, s.learner FROM studies s JOIN tasks t USING (task_id) "
            "WHERE s.study_id = ?",
            [int(study)],
        )
        if not rows:
            raise ArchiveError(f"no study with id {study} in {self.path}; `warmstart studies` lists them")
        space_id, fp, learner = rows[0]
        return self.space(int(space_id)), fp, learner

    def _study_metric(self, study: int) -> str:
        """The study's metric name (scores of a built-in metric are range-checked)."""
        return self._q("SELECT metric FROM studies WHERE study_id = ?", [int(study)])[0][0]

    def add_trials(self, study: int, frame: pd.DataFrame, where: str = "trials") -> int:
        """Validate and add a table of trials to a study in one transaction.

        Parameters
        ----------
        study : int
            Study id.
        frame : pandas.DataFrame
            One column per parameter plus ``score`` (see
            :func:`warmstart.archive.ingest.prepare_trials`).
        where : str
            Source name used in error messages.

        Returns
        -------
        int
            Number of trials added.
        """
        from warmstart.archive.ingest import prepare_trials

        space, fp, learner = self._study_keys(study)
        prepared = prepare_trials(space, frame, where=where, metric=self._study_metric(study))
        with self.transaction():
            self._insert_trials(int(study), space, fp, learner, prepared)
        return len(prepared)

    def record_trial(
        self,
        study: int,
        config: Mapping,
        score: float | None,
        status: str = "ok",
        cost_s: float | None = None,
        started_at: datetime | None = None,
        finished_at: datetime | None = None,
        error: str | None = None,
        fold_scores: Any = None,
    ) -> int:
        """Record one evaluated config (committed at once); returns its trial number.

        A score that is None, NaN or infinite records a failed trial.
        ``fold_scores`` (finite numbers) are the per-fold scores of a
        cross-validated objective.

        One parameterised INSERT (no table is built): the same checks as
        :meth:`add_trials` (:func:`~warmstart.archive.ingest.prepare_trial`),
        and the config text and content key come from the same SQL
        expression, so a trial recorded here and the same trial added in a
        table are stored byte for byte alike.
        """
        from warmstart.archive.ingest import param_columns, prepare_trial

        space_id, metric, fp, learner = self._study_head(study)
        space = self._space_cached(space_id)
        where = f"trial of study {study}"
        folds = _fold_scores(fold_scores, where)
        row = prepare_trial(space, config, score, status, cost_s, started_at, finished_at, error, where=where,
                            metric=metric)
        config_sql, keys = _config_sql(space)
        casts = _column_casts(space)
        given = ", ".join(f"?::{cast} AS {col}" for cast, col in zip(casts, param_columns(space)))
        # placeholders bind in text order: the row's cells, the keys (inside cfg), then the values;
        # plain statements only (a join or a sub-query in the INSERT costs DuckDB several times as much)
        sql = (
            "INSERT INTO trials (study_id, number, config, score, status, cost_s, started_at, finished_at, "
            "error, content_key, fold_scores) "
            "SELECT ?, ?, v.cfg, ?::DOUBLE, ?, ?::DOUBLE, ?::TIMESTAMP, ?::TIMESTAMP, ?, "
            "sha256(? || v.cfg), ?::DOUBLE[] "
            f"FROM (SELECT {config_sql} AS cfg FROM (SELECT {given})) v"
        )
        with translated(self.path), self.transaction() as con:
            if not con.execute("SELECT 1 FROM studies WHERE study_id = ?", [int(study)]).fetchall():
                self._heads.pop(int(study), None)  # the study went away since its keys were read
                raise ArchiveError(f"no study with id {study} in {self.path}; `warmstart studies` lists them")
            number = int(con.execute("SELECT coalesce(max(number), 0) + 1 FROM trials WHERE study_id = ?",
                                     [int(study)]).fetchall()[0][0])
            con.execute(sql, [int(study), number, row["score"], row["status"], row["cost_s"], row["started_at"],
                              row["finished_at"] or utc_now(), row["error"], f"{fp}|{learner}|", folds,
                              *keys, *row["values"]])
        return number

    def check_trial(self, study: int, config: Mapping, score: float | None, status: str = "ok",
                    cost_s: float | None = None, error: str | None = None) -> dict:
        """Validate one trial of a study as :meth:`record_trial` does, writing nothing.

        For a writer that records many trials with one statement
        (:meth:`insert_checked_trials`): the same rules and messages as
        :meth:`record_trial`; the finishing time is now.

        Returns
        -------
        dict
            The prepared row of :func:`~warmstart.archive.ingest.prepare_trial`.
        """
        from warmstart.archive.ingest import prepare_trial

        space_id, metric, _, _ = self._study_head(study)
        row = prepare_trial(self._space_cached(space_id), config, score, status, cost_s, None, None, error,
                            where=f"trial of study {study}", metric=metric)
        row["finished_at"] = utc_now()
        return row

    def next_trial_number(self, study: int) -> int:
        """The number the next trial of a study gets (one more than the largest, 1 for none)."""
        return int(self._q("SELECT coalesce(max(number), 0) + 1 FROM trials WHERE study_id = ?",
                           [int(study)])[0][0])

    def insert_checked_trials(self, trials: Sequence[tuple[int, dict, int]]) -> None:
        """Insert trials checked by :meth:`check_trial`: ``(study, row, number)`` each,
        with one statement per search space (studies of one space share it).

        The config text and content key come from the same SQL expression as
        in :meth:`record_trial` and :meth:`add_trials`, so a trial stored
        here is stored byte for byte alike. The caller owns the numbers (one
        writer that counts them) and knows the studies exist; inside an open
        transaction the inserts join it.
        """
        from warmstart.archive.ingest import param_columns

        groups: dict[int, list[tuple[int, dict, int]]] = {}
        for study, row, number in trials:
            groups.setdefault(self._study_head(study)[0], []).append((int(study), row, int(number)))
        with translated(self.path), self.transaction() as con:
            for space_id, group in groups.items():
                space = self._space_cached(space_id)
                config_sql, keys = _config_sql(space)
                casts = _column_casts(space)
                given = ", ".join(f"unnest(?::{cast}[]) AS {col}" for cast, col in zip(casts, param_columns(space)))
                # placeholders bind in text order: the JSON keys (inside cfg), then the columns
                sql = (
                    "INSERT INTO trials (study_id, number, config, score, status, cost_s, started_at, finished_at, "
                    "error, content_key, fold_scores) "
                    "SELECT v.study_id, v.number, v.cfg, v.score, v.status, v.cost_s, v.started_at, v.finished_at, "
                    "v.error, sha256(v.key_prefix || v.cfg), NULL "
                    f"FROM (SELECT {config_sql} AS cfg, * FROM (SELECT unnest(?::BIGINT[]) AS study_id, "
                    "unnest(?::INTEGER[]) AS number, unnest(?::VARCHAR[]) AS key_prefix, unnest(?::DOUBLE[]) AS score, "
                    "unnest(?::VARCHAR[]) AS status, unnest(?::DOUBLE[]) AS cost_s, "
                    "unnest(?::TIMESTAMP[]) AS started_at, unnest(?::TIMESTAMP[]) AS finished_at, "
                    f"unnest(?::VARCHAR[]) AS error, {given})) v"
                )
                prefixes = {study: "{2}|{3}|".format(*self._study_head(study)) for study, _, _ in group}
                rows = [row for _, row, _ in group]
                con.execute(sql, [*keys, [study for study, _, _ in group], [number for _, _, number in group],
                                  [prefixes[study] for study, _, _ in group], [r["score"] for r in rows],
                                  [r["status"] for r in rows], [r["cost_s"] for r in rows],
                                  [r["started_at"] for r in rows], [r["finished_at"] or utc_now() for r in rows],
                                  [r["error"] for r in rows],
                                  *([row["values"][j] for row in rows] for j in range(space.dim))])

    def _study_head(self, study: int) -> tuple[int, str, str, str]:
        """(space id, metric, task fingerprint, learner) of a study; all fixed once a
        study exists, so they are kept."""
        head = self._heads.get(int(study))
        if head is None:
            rows = self._q("SELECT s.space_id, s.metric, t.fingerprint, s.learner FROM studies s "
                           "JOIN tasks t USING (task_id) WHERE s.study_id = ?", [int(study)])
            if not rows:
                raise ArchiveError(f"no study with id {study} in {self.path}; `warmstart studies` lists them")
            space_id, metric, fp, learner = rows[0]
            head = self._heads[int(study)] = (int(space_id), metric, fp, learner)
        return head

    def _space_cached(self, space_id: int) -> Space:
        """:meth:`space`, kept per id (a stored space never changes: its id names its content)."""
        space = self._spaces.get(space_id)
        if space is None:
            space = self._spaces[space_id] = self.space(space_id)
        return space

    def _insert_trials(self, study: int, space: Space, fp: str, learner: str, prepared: pd.DataFrame) -> int:
        """Bulk insert of prepared trials; config JSON and content key built in SQL.

        Trial numbers come with the frame (no window function, so DuckDB runs
        the statement on all its threads). Choice and status columns are
        categoricals (scanned as ENUM, cast to text). Placeholders are bound in
        the order they appear in the statement text: the outer SELECT list
        (study, fingerprint, learner) comes before the sub-query that holds the
        JSON keys.
        """
        config_sql, keys = _config_sql(space)
        con = self.con
        start = int(con.execute("SELECT coalesce(max(number), 0) FROM trials WHERE study_id = ?", [study]).fetchall()[0][0])
        numbered = prepared.assign(_number=range(start + 1, start + len(prepared) + 1))
        view = f"_incoming_{uuid.uuid4().hex}"
        con.register(view, numbered)
        folds = "fold_scores" if "fold_scores" in prepared.columns else "NULL"  # one of two fixed names
        try:
            con.execute(
                f"""
                INSERT INTO trials (study_id, number, config, score, status, cost_s, started_at, finished_at,
                                    error, content_key, fold_scores)
                SELECT ?, _number, cfg, score, status::VARCHAR, cost_s,
                       started_at, finished_at, error, sha256(? || '|' || ? || '|' || cfg), {folds}
                FROM (SELECT {config_sql} AS cfg, * FROM {view})
                """,
                [study, fp, learner] + keys,
            )
        finally:
            # an interrupted insert (Ctrl-C, SIGTERM) aborts the transaction, and DuckDB then refuses
            # even the unregister; the caller's transaction rolls back and the interruption goes on
            with contextlib.suppress(duckdb.Error):
                con.unregister(view)
        return start + len(prepared)

    def _has_fold_scores(self) -> bool:
        """Whether the trials table has ``fold_scores`` (schema 3; an older file opened read-only lacks it)."""
        rows = self._q(
            "SELECT count(*) FROM duckdb_columns() WHERE database_name = current_database() "
            "AND table_name = 'trials' AND column_name = 'fold_scores'"
        )
        return bool(rows[0][0])

    def trials(self, study: int) -> pd.DataFrame:
        """Trials of a study: number, config (dict), score, status, cost_s, times, error,
        content_key and fold_scores (list of float, or None)."""
        frame = self._df(
            "SELECT number, config, score, status, cost_s, started_at, finished_at, error, content_key, "
            + ("fold_scores " if self._has_fold_scores() else "NULL AS fold_scores ")
            + "FROM trials WHERE study_id = ? ORDER BY number",
            [int(study)],
        )
        frame["config"] = [json.loads(c) for c in frame["config"]]
        return frame

    def trial_rows(self, study: int) -> list[dict]:
        """Trials of a study as plain dicts (no pandas): number, config (dict),
        score (None when failed), status, cost_s, error; by number."""
        rows = self._records(
            "SELECT number, config, score, status, cost_s, error FROM trials WHERE study_id = ? ORDER BY number",
            [int(study)],
        )
        for row in rows:
            row["config"] = json.loads(row["config"])
        return rows

    def trial_table(self, study: int) -> pd.DataFrame:
        """Trials of a study with one column per parameter (inactive = missing)."""
        import pandas as pd

        frame = self.trials(study)
        space = self.space(int(self._q("SELECT space_id FROM studies WHERE study_id = ?", [int(study)])[0][0]))
        values = pd.DataFrame(list(frame["config"]), columns=space.names, index=frame.index)
        return pd.concat([frame[["number"]], values, frame.drop(columns=["number", "config"])], axis=1)

    # -- one-shot ingest ---------------------------------------------------
    def ingest(
        self,
        trials: pd.DataFrame,
        *,
        task: str,
        data: pd.DataFrame,
        target: str,
        learner: str,
        space: Space,
        metric: str = "score",
        maximize: bool | None = None,
        where: str = "trials",
        source: str | None = None,
        owner: str | None = None,
        tags: Mapping[str, str] | None = None,
    ) -> tuple[int, int, int]:
        """Ingest a table of past trials as a new study, all in one transaction.

        The trials are validated before anything is written; the task is
        reused when its name and data match. ``maximize`` left as None takes
        a built-in metric's direction (higher is better for a custom metric
        name); a value that contradicts a built-in metric is refused.

        Returns
        -------
        (task_id, study_id, trial_count)
        """
        from warmstart.archive.ingest import prepare_trials, study_direction
        from warmstart.profile import PROFILE_VERSION, detect_kind
        from warmstart.profile import profile as compute_profile

        maximize = study_direction(metric, None if maximize is None else not maximize)
        prepared = prepare_trials(space, trials, where=where, metric=metric)  # fail before any work or write
        if target not in data.columns:
            raise ArchiveError(f"{source or 'data'}: target column {target!r} not found; columns are {list(data.columns)}")
        kind = detect_kind(data[target])
        prof = None
        fp = fingerprint(data, target)
        reuse = self._q("SELECT task_id FROM tasks WHERE name = ? AND fingerprint = ?", [task, fp])
        if not reuse or self._profile_version(reuse[0][0]) != PROFILE_VERSION:
            prof = compute_profile(data, target=target, kind=kind)
        with self.transaction():
            task_id = self.add_task(task, data, target, kind=kind, source=source, profile=prof)
            study_id = self.add_study(
                task_id, learner, space, metric=metric, maximize=maximize, origin="imported", owner=owner, tags=tags
            )
            n = self._insert_trials(study_id, space, fp, learner, prepared)  # validated once, above
            self.finish_study(study_id)
        return task_id, study_id, n

    # -- neighbours and defaults (computed in warmstart.archive.queries) ---
    def neighbors(self, prof: Mapping[str, float], learner: str | None = None, k: int = 5) -> pd.DataFrame:
        """Past tasks ranked by similarity of their profile to ``prof``, nearest first."""
        from warmstart.archive.queries import neighbors

        return neighbors(self, prof, learner=learner, k=k)

    def defaults(self, learner: str, near: Mapping[str, float] | None = None, n: int = 10,
                 kind: str | None = None) -> pd.DataFrame:
        """Configs that rank well across many past tasks of ``learner`` (optionally of one ``kind``)."""
        from warmstart.archive.queries import defaults

        return defaults(self, learner, near=near, n=n, kind=kind)

    def build_prior(self, prof: Mapping[str, float], learner: str, space: Space, exclude_tasks=(), **options: Any):
        """Build a :class:`~warmstart.prior.Prior` for ``learner`` over ``space``
        from the studies of tasks similar to ``prof`` (``exclude_tasks``: task
        ids left out; ``options`` go to :func:`~warmstart.prior.prior_from_sources`)."""
        from warmstart.archive.sources import prior_info, prior_sources
        from warmstart.prior import prior_from_sources

        sources = prior_sources(self, prof, learner, space, exclude_tasks=exclude_tasks)
        return prior_from_sources(space, sources, provenance=prior_info(learner), **options)


def _fold_scores(values: Any, where: str) -> list[float] | None:
    """Per-fold scores as a list of finite floats (None or empty: none)."""
    if values is None:
        return None
    try:
        folds = [float(v) for v in values]
    except (TypeError, ValueError):
        raise ArchiveError(f"{where}: fold_scores must be a list of numbers, got {values!r}") from None
    if not all(map(math.isfinite, folds)):
        raise ArchiveError(f"{where}: fold_scores must be finite numbers, got {folds}")
    return folds or None


def _column_casts(space) -> list[str]:
    """DuckDB type of each parameter's column, in the space's order (choices are text)."""
    return ["VARCHAR" if p.kind == "choice" else "BIGINT" if p.kind == "integer" else "DOUBLE" for p in space.params]


def _config_sql(space: Space) -> tuple[str, list[str]]:
    """The SQL expression of a trial's config text over the columns ``p0 ..``
    (real DOUBLE, integer BIGINT, choice the level's JSON text) and the JSON
    keys it binds, in order. Canonical JSON: keys sorted, no spaces, inactive
    parameters left out. The one place both inserts build the text from."""
    from warmstart.archive.ingest import param_columns

    cols = param_columns(space)
    order = sorted(range(space.dim), key=lambda j: space.params[j].name)
    parts, keys = [], []
    for j in order:
        value = f"to_json({cols[j]})::VARCHAR" if space.params[j].kind != "choice" else f"{cols[j]}::VARCHAR"
        parts.append(f"CASE WHEN {cols[j]} IS NULL THEN NULL ELSE ? || {value} END")
        keys.append(json.dumps(space.params[j].name) + ":")
    return "'{' || concat_ws(',', " + ", ".join(parts) + ") || '}'", keys


def _insert_frame(con: duckdb.DuckDBPyConnection, table: str, frame: pd.DataFrame, columns: list[str]) -> None:
    """Bulk insert of a DataFrame through a registered view (table/columns from this module)."""
    view = f"_frame_{uuid.uuid4().hex}"
    con.register(view, frame)
    try:
        con.execute(f"INSERT INTO {table} ({', '.join(columns)}) SELECT {', '.join(columns)} FROM {view}")
    finally:
        con.unregister(view)


def _split_sql(sql: str) -> list[str]:
    lines = [line for line in sql.splitlines() if not line.strip().startswith("--")]
    return [s.strip() for s in "\n".join(lines).split(";") if s.strip()]

