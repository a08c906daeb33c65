"""Merging another archive's history into this one: an archive file
(:func:`merge_archive`) or the tables of an exported Parquet store
(:func:`warmstart.archive.exchange.import_export`, which calls :func:`merge_from`).

Merge rules (DEVELOPERS.md "Curation" repeats them):

- **Tasks** are matched by dataset fingerprint. An unmatched task comes in
  with a new id; when its name is taken here by other data, it comes in as
  ``"NAME (from ABCD1234)"`` (the source archive id's first 8 characters) and
  the summary says so. A matched task whose profile here is missing or of an
  older version takes the source's current-version profile.
- **Spaces** are matched by (learner, content hash).
- **Same study**: a source study is the same study as one here when task
  fingerprint, learner, space hash, metric, direction and creation time are
  equal (an earlier merge of it); equals are paired one to one in id order.
- **Trials** follow the duplicate rule of :mod:`warmstart.archive.curate`: a
  copy of *another* study's trial (same content key, metric, direction,
  status and score) is a duplicate; identical repeats *inside one study* are
  repeated evaluations and all of them count. So, per trial identity:
  when a study here holds it, only the earliest such study here (its keeper)
  can receive more copies, and only from the source study that is the same
  study, as many as that source study has beyond the keeper's count (a study
  grown since the last merge); when no study here holds it, every copy in the
  earliest source study holding it comes in and copies in later source
  studies do not. Everything else is *already here*. A merge thus adds no
  duplicate trials, and merging the same archive twice adds nothing.
- **Studies**: a source study none of whose trials is new is *already here*.
  A source study with new trials extends the same study here (its new trials
  are numbered after the last one here); otherwise it comes in as a new study
  with ``source_archive`` = the source's archive id, ``merged_at`` = now, and
  its own trial numbers.

All of it runs in one transaction on the archive, with DuckDB's ``ATTACH``
(read-only) of the other file or Parquet scans, and bulk ``INSERT ... SELECT``
statements; only the small task, space and study maps pass through pandas.
Each step of :data:`MERGE_STEPS` is one function below, called in order by
:func:`merge_from`.
"""

from __future__ import annotations

import contextlib
import os
import re
from dataclasses import asdict, dataclass
from datetime import datetime
from pathlib import Path
from typing import Callable

import duckdb
import pandas as pd

from warmstart.archive.faults import DAMAGED, archive_error, damaged_error, damaged_file, fault_of, first_line
from warmstart.archive.sql import fetch
from warmstart.archive.store import DATA_TABLES, SCHEMA_VERSION, Archive, utc_now
from warmstart.errors import ArchiveDamagedError, ArchiveError

__all__ = ["MergeSummary", "MergeSource", "merge_archive", "merge_from", "MERGE_STEPS"]

_ALIAS = "_warmstart_src"  # catalog name of the attached archive
MERGE_STEPS = ("tasks", "profiles", "spaces", "trials", "studies", "insert")
_TRIAL_COLS = "study_id, number, config, score, status, cost_s, started_at, finished_at, error, content_key"
_IDENTITY_COLS = "content_key, metric, direction, status, score"  # a trial's identity (with its study's metric)
_STUDY_IDENTITY = "fingerprint, learner, content_hash, metric, direction, created_at"  # "the same study"
_RELATION = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*")  # a plain (dotted) SQL name


def _same_trial(a: str, b: str) -> str:
    """Join condition: trials ``a`` and ``b`` (relation aliases) are identical."""
    return (f"{a}.content_key = {b}.content_key AND {a}.metric = {b}.metric AND {a}.direction = {b}.direction "
            f"AND {a}.status = {b}.status AND {a}.score IS NOT DISTINCT FROM {b}.score")


def _studies_with_identity(studies: str, tasks: str, spaces: str) -> str:
    """Studies with what makes two of them the same study, ranked among equals by id."""
    return (f"SELECT *, row_number() OVER (PARTITION BY {_STUDY_IDENTITY} ORDER BY study_id) AS nth FROM ("
            f"SELECT s.study_id, k.fingerprint, s.learner, p.content_hash, s.metric, s.direction, s.created_at "
            f"FROM {studies} s JOIN {tasks} k ON k.task_id = s.task_id JOIN {spaces} p ON p.space_id = s.space_id)")


@dataclass(frozen=True)
class MergeSummary:
    """What a merge or import brought in and what was already here."""

    source: str
    source_archive: str
    tasks_new: int = 0
    tasks_matched: int = 0
    renamed: tuple = ()
    profiles_updated: int = 0
    spaces_new: int = 0
    spaces_matched: int = 0
    studies_new: int = 0
    studies_grown: int = 0
    studies_already_here: int = 0
    studies_skipped: int = 0
    trials_new: int = 0
    trials_already_here: int = 0
    trials_skipped: int = 0

    @property
    def changed(self) -> bool:
        """True when anything came in."""
        return bool(self.tasks_new or self.spaces_new or self.studies_new or self.trials_new or self.profiles_updated)

    def to_dict(self) -> dict:
        """Plain-data form (renamed tasks as ``[old, new]`` pairs)."""
        d = asdict(self)
        d["renamed"] = [list(pair) for pair in self.renamed]
        return d

    def lines(self) -> list[str]:
        """A readable summary, one line per kind of record."""
        out = [
            f"from {self.source} (archive {self.source_archive})",
            f"tasks:   {self.tasks_new} new, {self.tasks_matched} already here (same data)",
            f"spaces:  {self.spaces_new} new, {self.spaces_matched} already here",
            f"studies: {self.studies_new} new, {self.studies_grown} grown with new trials, "
            f"{self.studies_already_here} already here",
            f"trials:  {self.trials_new} new, {self.trials_already_here} already here",
        ]
        if self.profiles_updated:
            out.append(f"profiles: {self.profiles_updated} task profile(s) replaced by the source's current version")
        for old, new in self.renamed:
            out.append(f"renamed: task {old!r} holds other data here; the incoming one is called {new!r}")
        if self.studies_skipped or self.trials_skipped:
            out.append(
                f"skipped: {self.studies_skipped} studies and {self.trials_skipped} trials of the source with no "
                "trials, or whose task or space is missing there (run `warmstart curate check` on it)"
            )
        if not self.changed:
            out.append("nothing new: everything was already here")
        return out


@dataclass(frozen=True)
class MergeSource:
    """Where a merge reads the source's five tables, and what to call the source.

    Attributes
    ----------
    relations : dict
        Table name (each of :data:`~warmstart.archive.store.DATA_TABLES`) ->
        the relation to read it from: a table of an attached archive
        (``alias.main.trials``) or a registered view. Plain SQL names only:
        they are written into statements, so they never come from a user.
    archive_id : str
        The source archive's id (stored as ``source_archive`` on new studies).
    label : str
        The file or directory, for messages.
    """

    relations: dict
    archive_id: str
    label: str

    def __post_init__(self) -> None:
        missing = [t for t in DATA_TABLES if t not in self.relations]
        bad = [r for r in self.relations.values() if not isinstance(r, str) or not _RELATION.fullmatch(r)]
        if missing or bad:
            raise ValueError(f"a merge source needs a plain relation name for each of {list(DATA_TABLES)}; "
                             f"missing {missing}, not plain names {bad}")

    @property
    def tasks(self) -> str:
        """Relation of the source's tasks."""
        return self.relations["tasks"]

    @property
    def profiles(self) -> str:
        """Relation of the source's profiles."""
        return self.relations["profiles"]

    @property
    def spaces(self) -> str:
        """Relation of the source's spaces."""
        return self.relations["spaces"]

    @property
    def studies(self) -> str:
        """Relation of the source's studies."""
        return self.relations["studies"]

    @property
    def trials(self) -> str:
        """Relation of the source's trials."""
        return self.relations["trials"]


def _new_ids(con: duckdb.DuckDBPyConnection, sequence: str, n: int) -> list[int]:
    if n == 0:
        return []
    return [int(r[0]) for r in fetch(con, f"SELECT nextval('{sequence}') FROM range(?)", [n])]


def _map_tasks(con, src: MergeSource) -> tuple[pd.DataFrame, list[tuple[str, str]], int]:
    """src task id -> here task id; new tasks get fresh ids (and names when theirs is taken).

    A source task matches the task here with the same fingerprint and name,
    else the first task here with the same fingerprint; source tasks with the
    same data under different names stay apart when they are new here.
    """
    theirs = con.execute(f"SELECT task_id, name, fingerprint FROM {src.tasks} ORDER BY task_id").df()
    here = con.execute("SELECT task_id, name, fingerprint FROM tasks ORDER BY task_id").df()
    by_pair = {(fp, name): int(i) for i, name, fp in reversed(list(here.itertuples(index=False)))}
    by_fp = here.groupby("fingerprint")["task_id"].min().to_dict() if len(here) else {}
    names = set(here["name"])
    pairs = list(zip(theirs["fingerprint"], theirs["name"]))
    fresh = [p for p in dict.fromkeys(pairs) if p not in by_pair and p[0] not in by_fp]
    ids = dict(zip(fresh, _new_ids(con, "task_ids", len(fresh))))
    rows, renamed, matched, created = [], [], 0, {}
    for task_id, (fp, name) in zip(theirs["task_id"], pairs):  # one row per task (a small table)
        known = by_pair.get((fp, name), by_fp.get(fp))
        if known is not None:
            rows.append((task_id, known, False, name))
            matched += 1
            continue
        if (fp, name) in created:  # a repeated source row: the task this merge created
            rows.append((task_id, created[(fp, name)], False, name))
            continue
        new_name, k = name, 1
        while new_name in names:
            k += 1
            new_name = f"{name} (from {src.archive_id[:8]})" + (f" #{k - 1}" if k > 2 else "")
        if new_name != name:
            renamed.append((name, new_name))
        names.add(new_name)
        created[(fp, name)] = ids[(fp, name)]
        rows.append((task_id, ids[(fp, name)], True, new_name))
    frame = pd.DataFrame(rows, columns=["src_id", "here_id", "is_new", "name"])
    return frame.astype({"src_id": "int64", "here_id": "int64", "is_new": "bool"}), renamed, matched


def _map_spaces(con, src: MergeSource) -> tuple[pd.DataFrame, int]:
    theirs = con.execute(f"SELECT space_id, learner, content_hash FROM {src.spaces} ORDER BY space_id").df()
    here = con.execute("SELECT space_id, learner, content_hash FROM spaces ORDER BY space_id").df()
    known = here.groupby(["learner", "content_hash"])["space_id"].min().to_dict() if len(here) else {}
    keys = list(zip(theirs["learner"], theirs["content_hash"]))
    fresh = [k for k in dict.fromkeys(keys) if k not in known]
    ids = dict(zip(fresh, _new_ids(con, "space_ids", len(fresh))))
    matched = sum(k in known for k in keys)
    rows = []
    for space_id, key in zip(theirs["space_id"], keys):
        is_new = key in ids
        if is_new:
            known[key] = ids.pop(key)
        rows.append((space_id, known[key], is_new))
    frame = pd.DataFrame(rows, columns=["src_id", "here_id", "is_new"])
    return frame.astype({"src_id": "int64", "here_id": "int64", "is_new": "bool"}), matched


def merge_from(archive: Archive, src: MergeSource, progress: Callable[[str], None] | None = None) -> MergeSummary:
    """Merge the relations ``src`` names into ``archive``, in one transaction.

    The caller makes the source relations available (an attached archive
    file, or registered Parquet scans) and checks them first; this runs the
    steps of :data:`MERGE_STEPS` in order, each one function below.

    Parameters
    ----------
    archive : Archive
        Open for writing.
    src : MergeSource
        Where the source's five tables can be read.
    progress : callable, optional
        Called with the name of each step as it starts.

    Returns
    -------
    MergeSummary
        What came in and what was already here.

    Raises
    ------
    ArchiveError
        DuckDB refused a statement; nothing was changed.
    """
    step = progress or (lambda name: None)
    con = archive.con
    now = utc_now()
    try:
        with archive.transaction(), contextlib.ExitStack() as views:
            step("tasks")
            task_map, renamed, tasks_matched = _merge_tasks(con, src, views)
            step("profiles")
            profiles_updated = _merge_profiles(con, src)
            step("spaces")
            space_map, spaces_matched = _merge_spaces(con, src, views)
            step("trials")
            n_valid, n_all = _find_incoming_trials(con, src)
            step("studies")
            study_map, coming = _map_studies(con, src, views)
            step("insert")
            trials_new = _insert_studies_and_trials(con, src, now)
    except duckdb.Error as exc:
        if fault_of(exc) == DAMAGED:
            raise _damaged_during_merge(exc, src, archive) from None
        raise ArchiveError(f"{src.label}: cannot merge ({first_line(exc)}); nothing was changed") from None
    valid = study_map["valid"]
    return MergeSummary(
        source=src.label,
        source_archive=src.archive_id,
        tasks_new=int(task_map["is_new"].sum()),
        tasks_matched=int(tasks_matched),
        renamed=tuple(renamed),
        profiles_updated=int(profiles_updated),
        spaces_new=int(space_map["is_new"].sum()),
        spaces_matched=int(spaces_matched),
        studies_new=int(coming["is_new"].sum()),
        studies_grown=int((~coming["is_new"]).sum()),
        studies_already_here=int((valid & (study_map["n_new"] == 0) & (study_map["trial_count"] > 0)).sum()),
        studies_skipped=int((~valid | (study_map["trial_count"] == 0)).sum()),
        trials_new=int(trials_new),
        trials_already_here=int(n_valid - trials_new),
        trials_skipped=int(n_all - n_valid),
    )



def _damaged_during_merge(exc: duckdb.Error, src: MergeSource, archive: Archive) -> ArchiveError:
    """A damaged block met while merging: name the file when DuckDB does, else both."""
    named = damaged_file(exc)
    if named is not None:
        return damaged_error(named, f"DuckDB: {first_line(exc)}; nothing was changed")
    return ArchiveDamagedError(
        f"{src.label} or {archive.path}: a block of one of them is damaged (DuckDB: {first_line(exc)}); nothing "
        "was changed. `warmstart --archive FILE curate check` on each tells which, and `warmstart curate salvage` "
        "copies what can still be read from it into a new archive"
    )


def _register(con: duckdb.DuckDBPyConnection, views: contextlib.ExitStack, name: str, frame: pd.DataFrame) -> None:
    """Register ``frame`` as view ``name`` (one of this module's) until ``views`` closes."""
    con.register(name, frame)
    views.callback(con.unregister, name)


def _merge_tasks(con, src: MergeSource, views: contextlib.ExitStack) -> tuple[pd.DataFrame, list[tuple[str, str]], int]:
    """Step "tasks": map source tasks onto tasks here (view ``_ws_map_task``); insert the new ones."""
    task_map, renamed, matched = _map_tasks(con, src)
    _register(con, views, "_ws_map_task", task_map)
    con.execute(
        "INSERT INTO tasks (task_id, name, fingerprint, kind, target, n_rows, n_features, created_at, source) "
        f"SELECT m.here_id, m.name, t.fingerprint, t.kind, t.target, t.n_rows, t.n_features, t.created_at, "
        f"t.source FROM {src.tasks} t JOIN _ws_map_task m ON m.src_id = t.task_id WHERE m.is_new"
    )
    return task_map, renamed, matched


def _merge_profiles(con, src: MergeSource) -> int:
    """Step "profiles": profiles of new tasks come in; a matched task whose profile here is
    missing or not current takes the source's current-version profile. Returns how many
    tasks' profiles were replaced."""
    from warmstart.profile import PROFILE_VERSION

    con.execute(
        "INSERT INTO profiles (task_id, feature, value, version) SELECT m.here_id, p.feature, p.value, "
        f"p.version FROM {src.profiles} p JOIN _ws_map_task m ON m.src_id = p.task_id WHERE m.is_new"
    )
    v = str(PROFILE_VERSION)
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _ws_refresh AS "
        f"WITH sv AS (SELECT task_id FROM {src.profiles} GROUP BY task_id HAVING min(version) = ? "
        "AND max(version) = ?), "
        "hv AS (SELECT task_id FROM profiles GROUP BY task_id HAVING min(version) = ? AND max(version) = ?) "
        "SELECT m.here_id, min(m.src_id) AS src_id FROM _ws_map_task m JOIN sv ON sv.task_id = m.src_id "
        "WHERE NOT m.is_new AND m.here_id NOT IN (SELECT task_id FROM hv) GROUP BY m.here_id",
        [v, v, v, v],
    )
    updated = fetch(con, "SELECT count(*) FROM _ws_refresh")[0][0]
    con.execute("DELETE FROM profiles WHERE task_id IN (SELECT here_id FROM _ws_refresh)")
    con.execute(
        "INSERT INTO profiles (task_id, feature, value, version) SELECT r.here_id, p.feature, p.value, "
        f"p.version FROM {src.profiles} p JOIN _ws_refresh r ON r.src_id = p.task_id"
    )
    con.execute("DROP TABLE _ws_refresh")
    return int(updated)


def _merge_spaces(con, src: MergeSource, views: contextlib.ExitStack) -> tuple[pd.DataFrame, int]:
    """Step "spaces": map source spaces onto spaces here (view ``_ws_map_space``); insert the new ones."""
    space_map, matched = _map_spaces(con, src)
    _register(con, views, "_ws_map_space", space_map)
    con.execute(
        "INSERT INTO spaces (space_id, learner, definition, content_hash) SELECT m.here_id, s.learner, "
        f"s.definition, s.content_hash FROM {src.spaces} s JOIN _ws_map_space m ON m.src_id = s.space_id "
        "WHERE m.is_new"
    )
    return space_map, matched


def _find_incoming_trials(con, src: MergeSource) -> tuple[int, int]:
    """Step "trials": the source trials that come in, by the duplicate rule (temp table
    ``_ws_incoming``), with the valid source studies (``_ws_valid``) and the source studies
    that are the same study as one here (``_ws_same``). Returns (valid trials, all trials)
    of the source."""
    # Valid source trials: their study, task and space exist there.
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _ws_valid AS SELECT s.study_id, s.metric, s.direction, s.created_at "
        f"FROM {src.studies} s WHERE s.task_id IN (SELECT task_id FROM {src.tasks}) "
        f"AND s.space_id IN (SELECT space_id FROM {src.spaces})"
    )
    # The same study here (an earlier merge of it): equal task fingerprint, learner, space
    # hash, metric, direction and creation time; equals are paired in id order, one to one.
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _ws_same AS "
        f"SELECT t.study_id AS src_id, h.study_id AS here_id "
        f"FROM ({_studies_with_identity(src.studies, src.tasks, src.spaces)}) t "
        f"JOIN ({_studies_with_identity('studies', 'tasks', 'spaces')}) h "
        f"USING ({_STUDY_IDENTITY}, nth)"
    )
    # What comes in (the duplicate rule of curate.py: a copy of another study's trial is a
    # duplicate, repeats inside one study are repeated evaluations and all stay).
    # 1. Identities held nowhere here (anti-join first, so the window sorts only those):
    #    every copy in the earliest source study holding it, none from later ones.
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _ws_incoming AS "
        f"WITH i AS (SELECT t.study_id, t.number, t.config, t.score, t.status, t.cost_s, t.started_at, "
        f"t.finished_at, t.error, t.content_key, v.metric, v.direction, v.created_at FROM {src.trials} t "
        "JOIN _ws_valid v ON v.study_id = t.study_id), "
        "e AS (SELECT h.content_key, hs.metric, hs.direction, h.status, h.score FROM trials h "
        "JOIN studies hs ON hs.study_id = h.study_id) "
        f"SELECT * EXCLUDE (created_at) FROM i ANTI JOIN e ON {_same_trial('e', 'i')} "
        f"QUALIFY study_id = first_value(study_id) OVER (PARTITION BY {_IDENTITY_COLS} "
        "ORDER BY created_at, study_id)"
    )
    # 2. Identities held here: only the study here holding them first (the keeper) gains
    #    copies, from the source study that is that same study, those beyond the number it
    #    has (a study grown since the last merge). Counts are compared first, so only the
    #    few identities with more copies there than here are looked at trial by trial.
    con.execute(
        "INSERT INTO _ws_incoming "
        f"WITH m AS NOT MATERIALIZED (SELECT t.study_id, t.number, t.config, t.score, t.status, t.cost_s, "
        "t.started_at, t.finished_at, t.error, t.content_key, v.metric, v.direction, p.here_id AS same_id "
        f"FROM {src.trials} t JOIN _ws_valid v ON v.study_id = t.study_id "
        "JOIN _ws_same p ON p.src_id = t.study_id), "
        "e AS NOT MATERIALIZED (SELECT h.study_id, hs.created_at, h.content_key, hs.metric, hs.direction, "
        "h.status, h.score FROM trials h JOIN studies hs ON hs.study_id = h.study_id), "
        f"there AS (SELECT study_id, same_id, {_IDENTITY_COLS}, count(*) AS n FROM m "
        f"GROUP BY study_id, same_id, {_IDENTITY_COLS}), "
        f"here AS (SELECT study_id, {_IDENTITY_COLS}, count(*) AS have FROM e "
        f"WHERE study_id IN (SELECT here_id FROM _ws_same) GROUP BY study_id, {_IDENTITY_COLS}), "
        "more AS (SELECT there.*, here.have, s.created_at FROM there JOIN here "
        f"ON here.study_id = there.same_id AND {_same_trial('here', 'there')} "
        "JOIN studies s ON s.study_id = there.same_id WHERE there.n > here.have), "
        "earlier AS (SELECT DISTINCT more.study_id, more.content_key, more.metric, more.direction, "
        f"more.status, more.score FROM more JOIN e ON {_same_trial('e', 'more')} "
        "AND (e.created_at, e.study_id) < (more.created_at, more.same_id)), "
        f"kept AS (SELECT * FROM more ANTI JOIN earlier ON earlier.study_id = more.study_id "
        f"AND {_same_trial('earlier', 'more')}) "
        "SELECT m.* EXCLUDE (same_id) FROM m JOIN kept k ON k.study_id = m.study_id "
        f"AND {_same_trial('k', 'm')} "
        "QUALIFY row_number() OVER (PARTITION BY m.study_id, m.content_key, m.metric, m.direction, "
        "m.status, m.score ORDER BY m.number) > k.have"
    )
    n_valid, n_all = fetch(
        con,
        f"SELECT count(*) FILTER (WHERE t.study_id IN (SELECT study_id FROM _ws_valid)), count(*) "
        f"FROM {src.trials} t",
    )[0]
    return int(n_valid), int(n_all)


def _map_studies(con, src: MergeSource, views: contextlib.ExitStack) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Step "studies": every source study with its new-trial count and validity, and the
    map of those that bring trials onto their study here, new or grown (view
    ``_ws_map_study``: src_id, here_id, is_new, base = last trial number here)."""
    study_map = con.execute(
        "WITH inc AS (SELECT study_id, count(*) AS n_new FROM _ws_incoming GROUP BY study_id), "
        f"cnt AS (SELECT study_id, count(*) AS n FROM {src.trials} GROUP BY study_id), "
        "top AS (SELECT study_id, max(number) AS top FROM trials GROUP BY study_id) "
        "SELECT s.study_id AS src_id, coalesce(inc.n_new, 0) AS n_new, coalesce(cnt.n, 0) AS trial_count, "
        "s.study_id IN (SELECT study_id FROM _ws_valid) AS valid, same.here_id, "
        "coalesce(top.top, 0) AS base "
        f"FROM {src.studies} s LEFT JOIN inc ON inc.study_id = s.study_id "
        "LEFT JOIN cnt ON cnt.study_id = s.study_id LEFT JOIN _ws_same same ON same.src_id = s.study_id "
        "LEFT JOIN top ON top.study_id = same.here_id ORDER BY s.study_id"
    ).df()
    coming = study_map[study_map["valid"] & (study_map["n_new"] > 0)].copy()
    is_new = coming["here_id"].isna().to_numpy()
    fresh = _new_ids(con, "study_ids", int(is_new.sum()))
    here_id = coming["here_id"].astype("Int64").to_numpy(dtype=object)
    here_id[is_new] = fresh
    coming = pd.DataFrame(
        {"src_id": coming["src_id"].astype("int64").to_numpy(), "here_id": here_id.astype("int64"),
         "is_new": is_new, "base": coming["base"].astype("int64").to_numpy()}
    )
    _register(con, views, "_ws_map_study", coming)
    return study_map, coming


def _insert_studies_and_trials(con, src: MergeSource, now: datetime) -> int:
    """Step "insert": new studies (with their source archive and merge time), later finish
    times of grown ones, then the incoming trials (numbered after the last one here in a
    grown study). Drops the step's temp tables; returns the number of trials added."""
    con.execute(
        "INSERT INTO studies (study_id, task_id, learner, space_id, metric, direction, origin, prior, "
        "created_at, finished_at, owner, tags, source_archive, merged_at) "
        "SELECT m.here_id, tm.here_id, s.learner, pm.here_id, s.metric, s.direction, s.origin, s.prior, "
        "s.created_at, s.finished_at, s.owner, s.tags, ?, ? "
        f"FROM {src.studies} s JOIN _ws_map_study m ON m.src_id = s.study_id AND m.is_new "
        "JOIN _ws_map_task tm ON tm.src_id = s.task_id JOIN _ws_map_space pm ON pm.src_id = s.space_id",
        [src.archive_id, now],
    )
    con.execute(
        "UPDATE studies SET finished_at = x.finished_at FROM (SELECT m.here_id, max(s.finished_at) AS "
        f"finished_at FROM {src.studies} s JOIN _ws_map_study m ON m.src_id = s.study_id AND NOT m.is_new "
        "GROUP BY m.here_id) x WHERE studies.study_id = x.here_id AND x.finished_at IS NOT NULL "
        "AND (studies.finished_at IS NULL OR studies.finished_at < x.finished_at)"
    )
    con.execute(
        f"INSERT INTO trials ({_TRIAL_COLS}) SELECT m.here_id, i.number, i.config, i.score, i.status, "
        "i.cost_s, i.started_at, i.finished_at, i.error, i.content_key "
        "FROM _ws_incoming i JOIN _ws_map_study m ON m.src_id = i.study_id AND m.is_new"
    )
    con.execute(
        f"INSERT INTO trials ({_TRIAL_COLS}) SELECT m.here_id, m.base + row_number() OVER "
        "(PARTITION BY m.here_id ORDER BY i.study_id, i.number), i.config, i.score, i.status, i.cost_s, "
        "i.started_at, i.finished_at, i.error, i.content_key "
        "FROM _ws_incoming i JOIN _ws_map_study m ON m.src_id = i.study_id AND NOT m.is_new"
    )
    added = fetch(con, "SELECT count(*) FROM _ws_incoming")[0][0]
    con.execute("DROP TABLE _ws_incoming")
    con.execute("DROP TABLE _ws_valid")
    con.execute("DROP TABLE _ws_same")
    return int(added)


# -- merge another archive file ---------------------------------------------------
def _attach(con: duckdb.DuckDBPyConnection, other: Path) -> None:
    con.execute(f"DETACH DATABASE IF EXISTS {_ALIAS}")
    try:
        con.execute(f"ATTACH ? AS {_ALIAS} (READ_ONLY)", [str(other)])
    except duckdb.Error as exc:
        raise archive_error(exc, other, source=True) or ArchiveError(
            f"{other}: cannot open it as an archive ({first_line(exc)}); nothing was changed") from None


def _source_archive_id(con: duckdb.DuckDBPyConnection, label: str, tables: set[str], versions: list, ids: list) -> str:
    """Check a source's tables and schema version; return its archive id."""
    needed = {"schema_version", "archive_info", *DATA_TABLES}
    if "schema_version" not in tables:
        raise ArchiveError(
            f"{label}: a DuckDB database but not a warmstart archive (no schema_version table; "
            f"tables: {sorted(tables)[:8]}); give the path of a warmstart archive"
        )
    version = max([int(v) for v in versions if v is not None], default=0)
    if version > SCHEMA_VERSION:
        raise ArchiveError(
            f"{label}: archive schema version {version} is newer than this warmstart understands "
            f"({SCHEMA_VERSION}); upgrade warmstart, then merge again; nothing was changed"
        )
    if version < SCHEMA_VERSION:
        raise ArchiveError(
            f"{label}: archive schema version {version} is older than this warmstart's ({SCHEMA_VERSION}); open it "
            "once for writing with this warmstart (e.g. `warmstart --archive OTHER init`) to migrate it, then merge"
        )
    missing = sorted(needed - tables)
    if missing:
        raise ArchiveError(f"{label}: not a complete warmstart archive: table(s) {missing} missing")
    if not ids or not isinstance(ids[0], str) or not ids[0]:
        raise ArchiveError(f"{label}: not a complete warmstart archive: it has no archive id (archive_info is empty)")
    return ids[0]


def merge_archive(archive: Archive, other: str | Path, progress: Callable[[str], None] | None = None) -> MergeSummary:
    """Merge another archive file into ``archive``, in one transaction.

    Parameters
    ----------
    archive : Archive
        Open for writing.
    other : str or Path
        A warmstart archive file; attached read-only, never changed.
    progress : callable, optional
        Called with the name of each step (:data:`MERGE_STEPS`) as it starts.

    Returns
    -------
    MergeSummary
        What came in and what was already here (module docstring: the rules).

    Raises
    ------
    ArchiveError
        ``other`` is missing, not an archive, from a newer schema, or this
        archive itself. :class:`ArchiveLockedError` when a process writes it.
    """
    other = Path(other)
    if not other.exists():
        raise ArchiveError(f"{other}: no such file; give the path of another warmstart archive (.duckdb)")
    if other.is_dir():
        raise ArchiveError(
            f"{other}: is a directory; give an archive file, or import an export directory with "
            "`warmstart curate import`"
        )
    if archive.path != ":memory:" and Path(archive.path).exists() and os.path.samefile(other, archive.path):
        raise ArchiveError(f"{other}: is this archive itself; give another archive to merge")
    if archive.read_only:
        raise ArchiveError(f"{archive.path}: opened read-only; cannot merge into it")
    con = archive.con
    _attach(con, other)
    try:
        try:
            tables = {r[0] for r in fetch(
                con, "SELECT table_name FROM information_schema.tables WHERE table_catalog = ? "
                "AND table_schema = 'main'", [_ALIAS])}
            versions = [r[0] for r in fetch(con, f"SELECT version FROM {_ALIAS}.main.schema_version")] \
                if "schema_version" in tables else []
            ids = [r[0] for r in fetch(con, f"SELECT archive_id FROM {_ALIAS}.main.archive_info")] \
                if "archive_info" in tables else []
        except duckdb.Error as exc:
            raise archive_error(exc, other, source=True) or ArchiveError(
                f"{other}: cannot read it as a warmstart archive ({first_line(exc)})") from None
        source_id = _source_archive_id(con, str(other), tables, versions, ids)
        src = MergeSource({t: f"{_ALIAS}.main.{t}" for t in DATA_TABLES}, source_id, str(other))
        return merge_from(archive, src, progress)
    finally:
        con.execute(f"DETACH DATABASE IF EXISTS {_ALIAS}")
