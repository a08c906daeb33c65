"""Curation of the archive: integrity check and repair, dedupe (study filters,
labels and prune live in :mod:`warmstart.archive.labels` and are re-exported here).

Every repair runs in one transaction (:meth:`Archive.transaction`), so a crash
or an error leaves the archive exactly as it was. Bulk work happens in DuckDB
SQL; only the few rows of small tables (spaces, studies) pass through Python,
plus the distinct configs of each space when :func:`check_archive`
re-validates them with :meth:`Space.validate`.

Rules written down here (DEVELOPERS.md "Curation" repeats them):

- **Exact duplicate trial**: same content key (task fingerprint, learner,
  canonical config), same metric and direction of its study, same status and
  same score *as a trial of an earlier study* (ordered by the study's
  ``created_at``, then study id): the same result imported twice. The
  earliest study holding it keeps every copy it has. Repeats *within one
  study* are repeated evaluations (e.g. design points that snap to the same
  integer values), not duplicates: kept, and only counted as a note. A
  repeated evaluation with another score is information (noise) and is kept.
- **Labels follow the trials**: when a study goes because all its trials
  duplicate an earlier study's, its tags are merged into the study that keeps
  those trials (the kept study's value wins on a shared key) and its owner is
  carried over when the kept study has none.
- **Safe repairs** (``check --fix``) change nothing a query can use that is
  not wrong: orphan profiles and trials (nothing can reach them), non-finite
  scores marked ``ok`` (become ``failed``), scores on failed trials (moved
  into the error text), stale content keys and space hashes (recomputed),
  repeated trial numbers (renumbered after the study's last), exact duplicate
  trials, and studies with no trials. Everything else is reported only.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Callable, Iterable, Mapping

import pandas as pd

from warmstart.archive.labels import PRUNE_STEPS, PrunePlan, apply_prune, filter_studies, label_study, plan_prune
from warmstart.archive.faults import check_blocks
from warmstart.archive.sql import fetch, rows_changed
from warmstart.archive.store import ARCHIVE_TABLES, Archive
from warmstart.errors import ArchiveError, SpaceError
from warmstart.evaluate.metrics import SCORE_BOUNDS
from warmstart.space import Space

__all__ = [
    "Finding",
    "CheckReport",
    "check_archive",
    "fix_archive",
    "dedupe_trials",
    "trial_total",
    "DEDUPE_STEPS",
    "count_duplicates",
    "copies_elsewhere",
    "PrunePlan",
    "plan_prune",
    "apply_prune",
    "PRUNE_STEPS",
    "label_study",
    "filter_studies",
    "archive_digest",
    "ARCHIVE_TABLES",
]

_EXAMPLES = 5  # how many culprits a finding names

# For each trial, the earliest study holding an exact copy of it (its ``keeper``):
# a trial whose study is not its keeper is a duplicate; copies inside the keeper
# study are repeated evaluations and stay.
_DUPLICATE_RANK = (
    "SELECT t.rowid AS rid, first_value(t.study_id) OVER ("
    "PARTITION BY t.content_key, s.metric, s.direction, t.status, t.score "
    "ORDER BY s.created_at, t.study_id, t.number, t.rowid) AS keeper, t.study_id, t.number "
    "FROM trials t JOIN studies s USING (study_id)"
)
# Trials repeating an identical trial (same content key, status and score) of their own study.
_REPEATS_IN_STUDY = (
    "SELECT coalesce(sum(n - 1), 0) FROM (SELECT count(*) AS n FROM trials "
    "GROUP BY study_id, content_key, status, score HAVING count(*) > 1)"
)
_KEY_SQL = "sha256(k.fingerprint || '|' || s.learner || '|' || t.config)"
_STALE_KEYS = (
    "SELECT t.rowid AS rid, t.study_id, t.number, " + _KEY_SQL + " AS fresh "
    "FROM trials t JOIN studies s USING (study_id) JOIN tasks k ON k.task_id = s.task_id "
    "WHERE t.content_key <> " + _KEY_SQL
)


@dataclass(frozen=True)
class Finding:
    """One kind of problem found by :func:`check_archive`.

    Attributes
    ----------
    check : str
        Short name of the check (e.g. ``"duplicate_trials"``).
    count : int
        Number of rows with the problem (0 = fine).
    fixable : bool
        Whether ``check --fix`` repairs it.
    what : str
        What the check looks for.
    examples : tuple of str
        A few culprits, named (study and trial numbers, task names ...).
    """

    check: str
    count: int
    fixable: bool
    what: str
    examples: tuple = ()


@dataclass(frozen=True)
class CheckReport:
    """Result of :func:`check_archive`: findings plus informational notes."""

    path: str
    findings: tuple
    notes: dict = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        """True when no check found anything."""
        return all(f.count == 0 for f in self.findings)

    @property
    def problems(self) -> list:
        """The findings with a non-zero count."""
        return [f for f in self.findings if f.count]

    def to_frame(self) -> pd.DataFrame:
        """One row per check: check, count, fixable, what, examples."""
        return pd.DataFrame(
            [
                {"check": f.check, "count": f.count, "fixable": f.fixable, "what": f.what,
                 "examples": "; ".join(f.examples)}
                for f in self.findings
            ]
        )


def _count_examples(
    archive: Archive, sql: str, label: Callable[[tuple], str], params: list | None = None
) -> tuple[int, tuple]:
    """Count the rows of ``sql`` and name the first few."""
    n = fetch(archive.con, f"SELECT count(*) FROM ({sql})", params)[0][0]
    rows = fetch(archive.con, f"SELECT * FROM ({sql}) LIMIT {_EXAMPLES}", params) if n else []
    return int(n), tuple(label(r) for r in rows)


def _space_problems(archive: Archive) -> tuple[dict[int, Space], list[str], list[str]]:
    """Parse every space: (parsed spaces, unreadable ones, stale hashes)."""
    parsed, unreadable, stale = {}, [], []
    for space_id, learner, definition, stored in fetch(archive.con, "SELECT space_id, learner, definition, content_hash FROM spaces ORDER BY space_id"
    ):
        try:
            d = json.loads(definition)
            space = Space.from_dict({"params": d.get("params") if isinstance(d, dict) else d},
                                    where=f"space {space_id}")
        except (ValueError, SpaceError) as exc:
            unreadable.append(f"space {space_id} ({learner}): {str(exc)[:160]}")
            continue
        parsed[int(space_id)] = space
        if space.content_hash != stored:
            stale.append(f"space {space_id} ({learner})")
    return parsed, unreadable, stale


def _outside_space(archive: Archive, spaces: dict[int, Space], progress: Callable | None) -> tuple[int, tuple]:
    """Trials whose stored config is not a valid config of its study's space."""
    total = 0
    if progress:
        total = fetch(archive.con, "SELECT count(*) FROM (SELECT DISTINCT s.space_id, t.config FROM trials t "
                            "JOIN studies s USING (study_id))")[0][0]
    done = 0
    result = archive.con.execute(
        "SELECT s.space_id, t.config, count(*) AS n, min(t.study_id) AS study, "
        "arg_min(t.number, t.study_id) AS number "
        "FROM trials t JOIN studies s USING (study_id) GROUP BY s.space_id, t.config ORDER BY study, number"
    )
    bad, examples = 0, []
    while chunk := result.fetchmany(50_000):  # streamed: memory stays flat on big archives
        for space_id, config, n, study, number in chunk:
            space = spaces.get(int(space_id))
            if space is None:
                continue  # reported as an unreadable space or an orphan study
            try:
                space.validate(json.loads(config))
            except (ValueError, SpaceError) as exc:
                bad += int(n)
                if len(examples) < _EXAMPLES:
                    examples.append(f"study {study} trial {number}: {str(exc)[:160]}")
        done += len(chunk)
        if progress:
            progress(done, total)
    return bad, tuple(examples)


def count_duplicates(archive: Archive) -> int:
    """Number of exact duplicate trials (those dedupe would drop): copies of
    a trial of an earlier study; repeats within one study are not counted."""
    return int(fetch(archive.con, f"SELECT count(*) FROM ({_DUPLICATE_RANK}) WHERE study_id <> keeper")[0][0])


def copies_elsewhere(archive: Archive, study: int) -> tuple[int, list[int]]:
    """How many trials of ``study`` have an exact copy in another study.

    Exact copy: same content key (task data, learner, config), metric,
    direction, status and score, the duplicate rule of :func:`dedupe_trials`.

    Returns
    -------
    (int, list of int)
        Trials of ``study`` with a copy elsewhere, and the other studies' ids.
    """
    n, others = fetch(archive.con,
        "SELECT count(DISTINCT t.number), array_sort(list(DISTINCT o.study_id)) "
        "FROM trials t JOIN studies s USING (study_id) "
        "JOIN trials o ON o.content_key = t.content_key AND o.study_id <> t.study_id AND o.status = t.status "
        "AND o.score IS NOT DISTINCT FROM t.score "
        "JOIN studies os ON os.study_id = o.study_id AND os.metric = s.metric AND os.direction = s.direction "
        "WHERE t.study_id = ?",
        [int(study)],
    )[0]
    return int(n), [int(x) for x in (others or [])]


def check_archive(archive: Archive, progress: Callable[[int, int], None] | None = None) -> CheckReport:
    """Check the archive's integrity; change nothing.

    Parameters
    ----------
    archive : Archive
        The archive (read-only is enough).
    progress : callable, optional
        Called as ``progress(done, total)`` with counts of distinct configs
        validated (per chunk of 50,000).

    Returns
    -------
    CheckReport
        One :class:`Finding` per check, ``report.ok`` when all counts are 0.

    Raises
    ------
    ArchiveDamagedError
        A block of the file cannot be read (every value of every column is
        read first: :func:`warmstart.archive.faults.check_blocks`).
    """
    check_blocks(archive.con, archive.path, ARCHIVE_TABLES)  # a damaged file first: the checks below would stop at its first bad block
    spaces, unreadable, stale_hash = _space_problems(archive)
    n, examples = _outside_space(archive, spaces, progress)
    findings = [
        *_reference_findings(archive),
        Finding("unreadable_spaces", len(unreadable), False, "space definitions that are not a valid space",
                tuple(unreadable[:_EXAMPLES])),
        Finding("stale_space_hashes", len(stale_hash), True,
                "spaces whose stored content hash does not match their definition", tuple(stale_hash[:_EXAMPLES])),
        Finding("trials_outside_space", n, False,
                "trials whose config is not valid in their study's space (prune or fix by hand)", examples),
        *_score_findings(archive),
        *_trial_findings(archive),
        *_coverage_findings(archive),
    ]
    return CheckReport(archive.path, tuple(findings), _check_notes(archive))


def _finding(archive: Archive, check: str, fixable: bool, what: str, sql: str, label: Callable[[tuple], str],
             params: list | None = None) -> Finding:
    """A finding counted (and its first culprits named) by one query."""
    n, examples = _count_examples(archive, sql, label, params)
    return Finding(check, n, fixable, what, examples)


def _reference_findings(archive: Archive) -> list[Finding]:
    """Rows pointing at a task, study or space that does not exist."""
    return [
        _finding(archive, "orphan_profiles", True, "profile rows of a task that does not exist",
                 "SELECT DISTINCT task_id FROM profiles WHERE task_id NOT IN (SELECT task_id FROM tasks)",
                 lambda r: f"task id {r[0]}"),
        _finding(archive, "orphan_trials", True, "trials of a study that does not exist",
                 "SELECT study_id, number FROM trials WHERE study_id NOT IN (SELECT study_id FROM studies) "
                 "ORDER BY study_id, number", lambda r: f"study {r[0]} trial {r[1]}"),
        _finding(archive, "studies_without_task", False,
                 "studies whose task does not exist (prune them or restore the task)",
                 "SELECT study_id, task_id FROM studies WHERE task_id NOT IN (SELECT task_id FROM tasks) "
                 "ORDER BY study_id", lambda r: f"study {r[0]} (task id {r[1]})"),
        _finding(archive, "studies_without_space", False,
                 "studies whose space does not exist (prune them or restore the space)",
                 "SELECT study_id, space_id FROM studies WHERE space_id NOT IN (SELECT space_id FROM spaces) "
                 "ORDER BY study_id", lambda r: f"study {r[0]} (space id {r[1]})"),
    ]


def _score_findings(archive: Archive) -> list[Finding]:
    """Scores that cannot be: missing on an ok trial, outside a built-in metric's range, on a failed trial."""
    # Valid ranges of the built-in metrics: scikit-learn's metric definitions (see SCORE_BOUNDS).
    bounds = [(m, lo, hi) for m, (lo, hi) in SCORE_BOUNDS.items()]
    return [
        _finding(archive, "nonfinite_scores_ok", True,
                 "trials marked ok whose score is missing, NaN or infinite (become failed)",
                 "SELECT study_id, number, score FROM trials WHERE status = 'ok' AND (score IS NULL OR NOT "
                 "isfinite(score)) ORDER BY study_id, number",
                 lambda r: f"study {r[0]} trial {r[1]} (score {r[2]})"),
        _finding(archive, "scores_out_of_range", False,
                 "ok trials whose score is impossible for their built-in metric, e.g. accuracy above 1 "
                 "(prune or fix by hand)",
                 "SELECT t.study_id, t.number, s.metric, t.score FROM trials t JOIN studies s USING (study_id) "
                 "JOIN (VALUES " + ", ".join(["(?, CAST(? AS DOUBLE), CAST(? AS DOUBLE))"] * len(bounds)) + ") "
                 "AS b(metric, lo, hi) ON b.metric = s.metric "
                 "WHERE t.status = 'ok' AND isfinite(t.score) AND (t.score < b.lo OR t.score > b.hi) "
                 "ORDER BY t.study_id, t.number",
                 lambda r: f"study {r[0]} trial {r[1]} ({r[2]} {r[3]})", [v for row in bounds for v in row]),
        _finding(archive, "failed_with_score", True,
                 "failed trials that carry a score (the score moves into the error text)",
                 "SELECT study_id, number, score FROM trials WHERE status = 'failed' AND score IS NOT NULL "
                 "ORDER BY study_id, number", lambda r: f"study {r[0]} trial {r[1]} (score {r[2]})"),
    ]


def _trial_findings(archive: Archive) -> list[Finding]:
    """Trials whose key, number or existence is wrong: stale keys, repeated numbers, duplicates."""
    return [
        _finding(archive, "stale_content_keys", True,
                 "trials whose content key does not match task fingerprint, learner and config",
                 _STALE_KEYS + " ORDER BY t.study_id, t.number", lambda r: f"study {r[1]} trial {r[2]}"),
        _finding(archive, "repeated_trial_numbers", True, "trials sharing a number with another trial of the same study",
                 "SELECT study_id, number, count(*) AS n FROM trials GROUP BY study_id, number HAVING count(*) > 1 "
                 "ORDER BY study_id, number", lambda r: f"study {r[0]} trial {r[1]} ({r[2]} times)"),
        _finding(archive, "duplicate_trials", True,
                 "trials repeating a trial of an earlier study (same task data, learner, config, metric and result; "
                 "the earliest study keeps its copies)",
                 f"SELECT study_id, number FROM ({_DUPLICATE_RANK}) WHERE study_id <> keeper ORDER BY study_id, number",
                 lambda r: f"study {r[0]} trial {r[1]}"),
    ]


def _coverage_findings(archive: Archive) -> list[Finding]:
    """What a prior cannot use: profiles of another version, studies without trials, tasks without profiles."""
    from warmstart.profile import PROFILE_VERSION

    return [
        _finding(archive, "profile_version_mismatch", False,
                 f"tasks whose profile is not version {PROFILE_VERSION} (needs the dataset: ingest it again to "
                 "re-profile)",
                 "SELECT k.task_id, k.name, min(p.version), max(p.version) FROM tasks k JOIN profiles p USING (task_id) "
                 "GROUP BY k.task_id, k.name HAVING min(p.version) <> ? OR max(p.version) <> ? ORDER BY k.task_id",
                 lambda r: f"task {r[1]!r} (version {r[2]}" + (f"..{r[3]}" if r[3] != r[2] else "") + ")",
                 [str(PROFILE_VERSION)] * 2),
        _finding(archive, "studies_without_trials", True, "studies with no trials (nor a service's proposals)",
                 f"SELECT study_id FROM studies WHERE {_EMPTY_STUDY if _has_leases(archive) else _NO_TRIALS} "
                 "ORDER BY study_id", lambda r: f"study {r[0]}"),
        _finding(archive, "tasks_without_profiles", False,
                 "tasks with no profile (needs the dataset: ingest it again to profile it)",
                 "SELECT task_id, name FROM tasks WHERE task_id NOT IN (SELECT task_id FROM profiles) ORDER BY task_id",
                 lambda r: f"task {r[1]!r}"),
    ]


def _check_notes(archive: Archive) -> dict[str, int]:
    """Counts shown beside the findings: sizes, repeated evaluations, unused spaces."""
    con = archive.con
    notes = {
        "tasks": fetch(con, "SELECT count(*) FROM tasks")[0][0],
        "studies": fetch(con, "SELECT count(*) FROM studies")[0][0],
        "trials": fetch(con, "SELECT count(*) FROM trials")[0][0],
        "repeated_configs_other_result": fetch(
            con, "SELECT count(*) FROM (SELECT t.content_key, s.metric FROM trials t JOIN studies s USING (study_id) "
            "GROUP BY t.content_key, s.metric HAVING count(DISTINCT (t.status, t.score)) > 1)",
        )[0][0],
        "repeated_evaluations_same_result": fetch(con, _REPEATS_IN_STUDY)[0][0],
        "spaces_without_studies": fetch(
            con, "SELECT count(*) FROM spaces WHERE space_id NOT IN (SELECT space_id FROM studies)")[0][0],
    }
    return {k: int(v) for k, v in notes.items()}


_EMPTIED = (
    f"SELECT study_id, array_sort(list(DISTINCT keeper)) AS keepers FROM ({_DUPLICATE_RANK}) "
    "GROUP BY study_id HAVING bool_and(study_id <> keeper)"
)


def _carry_labels(archive: Archive, emptied: list[tuple[int, list[int]]]) -> None:
    """Merge the tags (and the owner, where the kept study has none) of each
    emptied study into the studies that keep its trials; earliest study first."""
    ids = sorted({s for s, _ in emptied} | {k for _, keepers in emptied for k in keepers})
    if not ids:
        return
    rows = fetch(archive.con, f"SELECT study_id, owner, tags FROM studies WHERE study_id IN ({', '.join('?' * len(ids))}) "
                       "ORDER BY created_at, study_id", ids)
    labels = {int(r[0]): [r[1], json.loads(r[2]) if r[2] else {}] for r in rows}
    order = {study: i for i, study in enumerate(labels)}
    changed = set()
    for study, keepers in sorted(emptied, key=lambda e: order.get(e[0], 0)):
        owner, tags = labels[int(study)]
        for keeper in keepers:
            kept = labels[int(keeper)]
            if kept[0] is None and owner is not None:
                kept[0] = owner
                changed.add(int(keeper))
            new = {k: v for k, v in tags.items() if k not in kept[1]}
            if new:
                kept[1].update(new)
                changed.add(int(keeper))
    for keeper in sorted(changed):
        owner, tags = labels[keeper]
        archive.con.execute("UPDATE studies SET owner = ?, tags = ? WHERE study_id = ?",
                            [owner, json.dumps(tags, sort_keys=True), keeper])


#: the steps of :func:`dedupe_trials`, in order (names a progress display shows)
DEDUPE_STEPS = ("finding duplicates", "moving tags", "deleting trials", "deleting studies")


def _delete_duplicates(archive: Archive, progress: Callable[[str], None] | None = None) -> tuple[int, int]:
    """Delete exact duplicates (copies of an earlier study's trials) and the
    studies that held nothing else, whose labels go to the studies that keep
    their trials; returns (trials, studies) removed. Call inside a transaction.
    ``progress`` is called with each name of :data:`DEDUPE_STEPS` as it starts."""
    step = progress or (lambda name: None)
    # The ranking joins studies, so find the studies to empty before deleting anything.
    step(DEDUPE_STEPS[0])
    found = fetch(archive.con, _EMPTIED)
    step(DEDUPE_STEPS[1])
    _carry_labels(archive, [(int(s), [int(k) for k in keepers]) for s, keepers in found])
    emptied = [int(r[0]) for r in found]
    step(DEDUPE_STEPS[2])
    trials = rows_changed(archive.con, f"DELETE FROM trials WHERE rowid IN (SELECT rid FROM ({_DUPLICATE_RANK}) WHERE study_id <> keeper)"
    )
    studies = 0
    step(DEDUPE_STEPS[3])
    for start in range(0, len(emptied), 1000):
        chunk = emptied[start:start + 1000]
        studies += rows_changed(archive.con, f"DELETE FROM studies WHERE study_id IN ({', '.join('?' * len(chunk))})", chunk
        )
    if studies:
        archive.con.execute(_ORPHAN_LEASES)
    return trials, studies


#: the service's leases (schema version 2) of studies no longer in the archive
_ORPHAN_LEASES = "DELETE FROM leases WHERE study_id NOT IN (SELECT study_id FROM studies)"
#: a study with no trial; one the service created and handed out proposals of (leases) is in use
_NO_TRIALS = "study_id NOT IN (SELECT study_id FROM trials)"
_EMPTY_STUDY = _NO_TRIALS + " AND study_id NOT IN (SELECT study_id FROM leases)"


def _has_leases(archive: Archive) -> bool:
    """Whether the archive has the service's lease table (schema 2 on; a read-only version-1 file has not)."""
    return bool(archive.con.execute(
        "SELECT count(*) FROM duckdb_tables() WHERE database_name = current_database() AND schema_name = 'main' "
        "AND table_name = 'leases'").fetchall()[0][0])


def fix_archive(archive: Archive) -> list[tuple[str, int]]:
    """Repair the safe cases found by :func:`check_archive`, in one transaction.

    Returns
    -------
    list of (str, int)
        What was done and to how many rows, in order (zero counts left out).
    """
    done: list[tuple[str, int]] = []
    with archive.transaction():
        parsed, _, _ = _space_problems(archive)
        n_hash = 0
        for space_id, space in parsed.items():
            fresh = space.content_hash
            n_hash += rows_changed(archive.con, "UPDATE spaces SET content_hash = ? WHERE space_id = ? AND content_hash <> ?",
                [fresh, space_id, fresh],
            )
        steps = [
            ("deleted orphan profile rows",
             "DELETE FROM profiles WHERE task_id NOT IN (SELECT task_id FROM tasks)"),
            ("deleted orphan trials (their study does not exist)",
             "DELETE FROM trials WHERE study_id NOT IN (SELECT study_id FROM studies)"),
            ("recomputed stale content keys",
             f"UPDATE trials SET content_key = x.fresh FROM ({_STALE_KEYS}) x WHERE trials.rowid = x.rid"),
            ("marked trials with a missing or non-finite score as failed",
             "UPDATE trials SET status = 'failed', score = NULL, "
             "error = coalesce(error, 'score is missing or not finite') "
             "WHERE status = 'ok' AND (score IS NULL OR NOT isfinite(score))"),
            ("moved the score of failed trials into their error text",
             "UPDATE trials SET error = coalesce(error || '; ', '') || 'score ' || CAST(score AS VARCHAR) "
             "|| ' removed: a failed trial has no score', score = NULL WHERE status = 'failed' AND score IS NOT NULL"),
            ("renumbered trials that repeated a number in their study",
             "UPDATE trials SET number = x.fresh FROM ("
             " SELECT rid, top + row_number() OVER (PARTITION BY study_id ORDER BY number, rid) AS fresh FROM ("
             "  SELECT rowid AS rid, study_id, number, max(number) OVER (PARTITION BY study_id) AS top,"
             "  row_number() OVER (PARTITION BY study_id, number ORDER BY rowid) AS k FROM trials) WHERE k > 1"
             ") x WHERE trials.rowid = x.rid"),
        ]
        if n_hash:
            done.append(("recomputed stale space content hashes", n_hash))
        for what, sql in steps:
            n = rows_changed(archive.con, sql)
            if n:
                done.append((what, n))
        trials, emptied = _delete_duplicates(archive)
        if trials:
            done.append(("deleted trials repeating an earlier study's (kept the earliest study's copies)", trials))
        n = rows_changed(archive.con, f"DELETE FROM studies WHERE {_EMPTY_STUDY}") + emptied
        if n:
            done.append(("deleted studies with no trials", n))
        archive.con.execute(_ORPHAN_LEASES)  # the service's leases of the studies deleted
    return done


def trial_total(archive: Archive) -> int:
    """Number of trials in the archive (every study)."""
    return int(fetch(archive.con, "SELECT count(*) FROM trials")[0][0])


def dedupe_trials(archive: Archive, dry_run: bool = False,
                  progress: Callable[[str], None] | None = None) -> tuple[int, int]:
    """Drop trials that repeat a trial of an earlier study, in one transaction.

    Repeats within one study (repeated evaluations) stay. A study all of whose
    trials repeat earlier studies' goes; its tags and owner move to the
    studies that keep its trials (see the module's rules).

    Parameters
    ----------
    archive : Archive
        Open for writing (unless ``dry_run``).
    dry_run : bool, default False
        Only count.
    progress : callable, optional
        Called with the name of each step (:data:`DEDUPE_STEPS`) as it
        starts (not for a dry run, which is one query).

    Returns
    -------
    (int, int)
        Trials removed (or that would be), and studies removed because every
        one of their trials was a duplicate of an earlier study's.
    """
    if dry_run:
        emptied = fetch(archive.con,
            f"SELECT count(*) FROM ({_EMPTIED})",
        )[0][0]
        return count_duplicates(archive), int(emptied)
    with archive.transaction():
        return _delete_duplicates(archive, progress)


def archive_digest(archive: Archive, ignore: Mapping[str, Iterable[str]] | None = None) -> dict[str, str]:
    """A canonical dump of every table, hashed: ``{table: "rows:sha256"}``.

    Rows are rendered by DuckDB and sorted, so two archives holding the same
    rows give the same digest whatever their physical order. Used to prove
    that a failed command changed nothing.

    Parameters
    ----------
    ignore : mapping of table -> column names, optional
        Columns left out (e.g. ``{"studies": ["created_at"]}`` to compare the
        outcome of two runs of one command made at different times).
    """
    out = {}
    present = {r[0] for r in fetch(archive.con, "SELECT table_name FROM information_schema.tables "
                                                "WHERE table_schema = 'main' AND table_catalog = current_database()")}
    for table in ARCHIVE_TABLES:  # identifiers from the allow-list only
        if table not in present:  # a version-1 archive opened read-only has no service tables
            continue
        columns = [d[0] for d in archive.con.execute(f"SELECT * FROM {table} LIMIT 0").description]
        dropped = set((ignore or {}).get(table, ()))
        unknown = dropped - set(columns)
        if unknown:
            raise ArchiveError(f"table {table} has no column(s) {sorted(unknown)}; it has {columns}")
        kept = ", ".join(c for c in columns if c not in dropped)  # names from the table itself
        n, digest = fetch(archive.con,
            f"SELECT count(*), sha256(coalesce(string_agg(x, chr(10) ORDER BY x), '')) "
            f"FROM (SELECT CAST(ROW({kept}) AS VARCHAR) AS x FROM {table})",
        )[0]
        out[table] = f"{n}:{digest}"
    return out
