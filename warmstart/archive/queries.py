"""Read-only questions to the archive: which past tasks resemble a new one
(:func:`similar_tasks`, :func:`neighbors`) and which configs did well across
many past tasks (:func:`defaults`).

:func:`similar_tasks` is the one place a similarity to a profile is computed
from the archive: ``neighbors`` prints it, ``defaults`` weighs tasks by it and
the prior builder (:mod:`warmstart.archive.sources`) weights its sources by it.

Only profiles of the current :data:`~warmstart.profile.PROFILE_VERSION` and of
the same task kind are compared; tasks profiled by another version are left
out and said so in ``frame.attrs["notes"]``. The standardised profile matrix
is built once per archive state and cached, so repeated queries cost a
vectorised distance computation and two small SQL look-ups.
"""

from __future__ import annotations

import json
import threading
import uuid
from collections import OrderedDict
from typing import Mapping

import numpy as np
import pandas as pd

from warmstart.errors import ArchiveError, ProfileError
from warmstart.profile import PROFILE_VERSION, profile_kind
from warmstart.similarity import ProfileIndex

__all__ = ["similar_tasks", "neighbors", "defaults", "learners", "profile_index", "clear_cache"]

NEIGHBOR_COLUMNS = [
    "task_id", "task", "distance", "similarity", "n_studies", "study_ids", "trial_count", "best_score", "metric",
]
DEFAULT_COLUMNS = ["config", "shrunk_quantile", "mean_quantile", "n_tasks", "trial_count", "weight"]
PSEUDO_TASKS = 1.0  # neutral pseudo-observations behind the ranking of defaults (a Bayesian average, common practice)
_CACHE: OrderedDict = OrderedDict()
_CACHE_LOCK = threading.Lock()
_CACHE_SIZE = 16


def _cached(key: tuple, compute):
    with _CACHE_LOCK:  # threads of one process (the team service) share the cache
        if key in _CACHE:
            _CACHE.move_to_end(key)
            return _CACHE[key]
    value = compute()  # outside the lock: two threads may both compute a missing entry, never corrupt it
    with _CACHE_LOCK:
        _CACHE[key] = value
        while len(_CACHE) > _CACHE_SIZE:
            _CACHE.popitem(last=False)
    return value


def _studies_state(archive) -> tuple:
    """Cheap fingerprint of the studies table (rows are only appended or deleted)."""
    con = archive.con
    return (archive.path, id(con)) + con.execute(
        "SELECT count(*), max(rowid), sum(task_id) FROM studies"
    ).fetchall()[0]


def learners(archive, state: tuple | None = None) -> list[str]:
    """Learners that have at least one study in the archive, sorted."""
    state = state or _studies_state(archive)
    return _cached(
        ("learners",) + state,
        lambda: [r[0] for r in archive.con.execute("SELECT DISTINCT learner FROM studies ORDER BY 1").fetchall()],
    )


def _check_learner(archive, learner: str, state: tuple | None = None) -> None:
    known = learners(archive, state)
    if learner not in known:
        listed = ", ".join(known) if known else "none yet (ingest or tune a study first)"
        raise ArchiveError(f"no studies of learner {learner!r} in {archive.path}; learners with studies: {listed}")


def _check_profile(prof: Mapping[str, float]) -> dict[str, float]:
    if not isinstance(prof, Mapping) or not prof:
        raise ProfileError(f"a profile must be a non-empty mapping of meta-feature -> number, got {type(prof).__name__}")
    out = {}
    for key, value in prof.items():
        try:
            out[str(key)] = float(value)
        except (TypeError, ValueError):
            raise ProfileError(f"profile value of {key!r} is not a number: {value!r}") from None
        if not np.isfinite(out[str(key)]):
            raise ProfileError(f"profile value of {key!r} is not finite: {value!r}")
    return out


def _positive_int(name: str, value: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ArchiveError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


def clear_cache() -> None:
    """Forget cached profile indexes (needed only after editing the profiles
    table in place with UPDATE, which warmstart itself never does)."""
    with _CACHE_LOCK:
        _CACHE.clear()


def _signature(con) -> tuple:
    """Cheap fingerprint of the tables the index depends on.

    warmstart writes profiles by DELETE + INSERT in one transaction, and new
    rows get higher row ids, so row counts and the largest row id change with
    every write; task ids come from a sequence and are never reused. A scan
    of every value would be exact but costs tens of milliseconds on 100,000
    tasks.
    """
    return con.execute(
        "SELECT (SELECT count(*) FROM profiles), (SELECT max(rowid) FROM profiles), "
        "count(*), max(rowid), sum(task_id) FROM tasks"
    ).fetchall()[0]


def _learner_tasks(archive, learner: str, state: tuple | None = None) -> np.ndarray:
    """Task ids with studies of ``learner`` (cached per state of the studies table)."""
    state = state or _studies_state(archive)

    def compute() -> np.ndarray:
        sql = "SELECT DISTINCT task_id FROM studies WHERE learner = ? ORDER BY 1"
        return np.asarray(archive.con.execute(sql, [learner]).fetchnumpy()["task_id"], dtype=np.int64)

    return _cached(("learner_tasks", learner) + state, compute)


def profile_index(archive, kind: str, version: str = PROFILE_VERSION) -> tuple[ProfileIndex | None, list[str]]:
    """The standardised profiles of the archive's ``kind`` tasks of ``version``.

    Returns the index (None when no task qualifies) and notes about tasks left
    out. Cached per archive connection and content of the profiles table.
    """
    con = archive.con
    key = ("index", archive.path, id(con), kind, version) + _signature(con)
    return _cached(key, lambda: _build_index(con, kind, version))


def _build_index(con, kind: str, version: str) -> tuple[ProfileIndex | None, list[str]]:
    counts = con.execute(
        "SELECT p.version, count(DISTINCT p.task_id) FROM profiles p JOIN tasks t USING (task_id) "
        "WHERE t.kind = ? GROUP BY p.version ORDER BY p.version",
        [kind],
    ).fetchall()
    notes = [
        f"{n} {kind} task(s) with profile version {v} left out (this warmstart computes version {version}; "
        "add their data again to recompute)"
        for v, n in counts
        if v != version
    ]
    features = [
        r[0]
        for r in con.execute(
            "SELECT DISTINCT p.feature FROM profiles p JOIN tasks t USING (task_id) "
            "WHERE t.kind = ? AND p.version = ? ORDER BY 1",
            [kind, version],
        ).fetchall()
    ]
    index = None
    if features:
        cols = con.execute(
            "SELECT p.task_id, list_position(?, p.feature) - 1 AS j, p.value FROM profiles p "
            "JOIN tasks t USING (task_id) WHERE t.kind = ? AND p.version = ?",
            [features, kind, version],
        ).fetchnumpy()
        task_ids, rows = np.unique(cols["task_id"], return_inverse=True)
        X = np.full((task_ids.size, len(features)), np.nan)
        X[rows, np.asarray(cols["j"], dtype=np.int64)] = cols["value"]
        index = ProfileIndex.from_arrays(task_ids, features, X)
    return index, notes


def _placeholders(n: int) -> str:
    return "(" + ", ".join(["?"] * n) + ")"


def _study_summary(archive, task_ids: list[int], learner: str | None) -> pd.DataFrame:
    """Per task: its studies (of ``learner``), trial count and best score.

    The best score is over the task's studies when they share metric and
    direction, else that of its largest study (the metric column says so).
    """
    columns = ["task_id", "n_studies", "study_ids", "trial_count", "best_score", "metric"]
    if not task_ids:
        return pd.DataFrame(columns=columns)
    con = archive.con
    params: list = [int(t) for t in task_ids]
    sql = f"SELECT study_id, task_id, metric, direction FROM studies WHERE task_id IN {_placeholders(len(params))}"
    if learner is not None:
        sql += " AND learner = ?"
        params.append(learner)
    studies = con.execute(sql + " ORDER BY study_id", params).fetchall()
    stats = {}
    if studies:
        stats = {
            row[0]: row[1:]
            for row in con.execute(
                "SELECT study_id, count(*), max(score) FILTER (WHERE status = 'ok'), "
                "min(score) FILTER (WHERE status = 'ok') FROM trials WHERE study_id = ANY(?) GROUP BY study_id",
                [[int(s[0]) for s in studies]],
            ).fetchall()
        }
    per_task: dict[int, list] = {int(t): [] for t in task_ids}
    for study_id, task_id, metric, direction in studies:
        n, best_max, best_min = stats.get(study_id, (0, None, None))
        best = best_max if direction == "maximize" else best_min
        per_task[int(task_id)].append((int(study_id), metric, direction, int(n), best))
    rows = []
    for task_id, mine in per_task.items():
        kinds = {(m, d) for _, m, d, _, _ in mine}
        best, metric = np.nan, None
        if len(kinds) == 1:
            metric, direction = kinds.pop()
            values = [b for *_, b in mine if b is not None]
            if values:
                best = max(values) if direction == "maximize" else min(values)
        elif mine:
            largest = max(mine, key=lambda s: s[3])
            metric = f"{largest[1]} (largest study)"
            best = np.nan if largest[4] is None else largest[4]
        rows.append({
            "task_id": task_id, "n_studies": len(mine), "study_ids": [s[0] for s in mine],
            "trial_count": sum(s[3] for s in mine), "best_score": float(best), "metric": metric,
        })
    return pd.DataFrame(rows, columns=columns)


def _comparable(archive, prof: dict, version: str) -> tuple[ProfileIndex, list[str], str]:
    kind = profile_kind(prof)
    index, notes = profile_index(archive, kind, version)
    if index is None or len(index) == 0:
        versions = archive.con.execute(
            "SELECT DISTINCT p.version FROM profiles p JOIN tasks t USING (task_id) WHERE t.kind = ? ORDER BY 1", [kind]
        ).fetchall()
        if versions:
            raise ArchiveError(
                f"{archive.path}: no {kind} task has a profile of version {version} (found version(s) "
                f"{', '.join(v[0] for v in versions)}); profiles of different versions are not comparable. "
                "Add the tasks' data again to recompute their profiles."
            )
        raise ArchiveError(f"{archive.path}: no {kind} tasks in the archive to compare with")
    missing = [f for f in index.features if f not in prof]
    if missing:
        notes = notes + [f"the profile lacks {len(missing)} meta-feature(s) the archive has ({', '.join(missing[:5])})"]
    return index, notes, kind


def similar_tasks(
    archive,
    prof: Mapping[str, float],
    learner: str | None = None,
    k: int | None = None,
    weights: Mapping[str, float] | None = None,
    version: str = PROFILE_VERSION,
) -> pd.DataFrame:
    """Past tasks with their profile distance and similarity to ``prof``.

    Distances are measured after standardising over every task of the same
    kind with a ``version`` profile; similarities come from
    :func:`warmstart.similarity.task_similarity` over the candidates (the
    tasks with studies of ``learner``, or every comparable task). A task's
    similarity does not depend on ``k`` nor on which tasks a caller leaves
    out afterwards.

    Parameters
    ----------
    archive : Archive
    prof : mapping
        Profile of the new task (from :func:`warmstart.profile`).
    learner : str, optional
        Only tasks with studies of this learner.
    k : int, optional
        Keep the k nearest (all when omitted).
    weights : mapping, optional
        Meta-feature or group weights (see :func:`warmstart.similarity.feature_weights`).
    version : str, default PROFILE_VERSION
        Profile version ``prof`` was computed with.

    Returns
    -------
    pandas.DataFrame
        Nearest first: ``task_id``, ``distance``, ``similarity``;
        ``attrs["notes"]`` lists tasks left out and why.

    Raises
    ------
    ArchiveError
        Unknown learner (the message lists the learners that exist), or no
        task with a comparable profile.
    ProfileError
        ``prof`` is not a mapping of finite numbers.
    """
    prof = _check_profile(prof)
    state = _studies_state(archive)
    if learner is not None:
        _check_learner(archive, learner, state)
    index, notes, kind = _comparable(archive, prof, version)
    candidates = None
    if learner is not None:
        candidates = _learner_tasks(archive, learner, state)
        comparable = index.contains(candidates)
        if not comparable.any():
            raise ArchiveError(
                f"{archive.path}: learner {learner!r} has studies only on tasks that are not comparable with this "
                f"{kind} profile (other task kind or profile version)"
            )
        if (~comparable).any():
            notes = notes + [
                f"{int((~comparable).sum())} task(s) with {learner!r} studies left out: another task kind "
                "or profile version"
            ]
    found = index.query(prof, k=k, candidates=candidates, weights=weights)
    found.attrs["notes"] = notes
    return found


def neighbors(
    archive,
    prof: Mapping[str, float],
    learner: str | None = None,
    k: int = 5,
    weights: Mapping[str, float] | None = None,
    version: str = PROFILE_VERSION,
) -> pd.DataFrame:
    """Past tasks ranked by similarity of their profile to ``prof``.

    Parameters
    ----------
    archive : Archive
    prof : mapping
        Profile of the new task (from :func:`warmstart.profile`).
    learner : str, optional
        Only tasks with studies of this learner.
    k : int, default 5
        How many neighbors.
    weights : mapping, optional
        Meta-feature or group weights (see :func:`warmstart.similarity.feature_weights`).
    version : str, default PROFILE_VERSION
        Profile version ``prof`` was computed with.

    Returns
    -------
    pandas.DataFrame
        Nearest first: task_id, task, distance, similarity (from
        :func:`similar_tasks`: the values that weight a prior's sources),
        n_studies, study_ids, trial_count and best_score (of the learner's
        studies) and metric. ``attrs["notes"]`` lists tasks left out and why.

    Raises
    ------
    ArchiveError
        Unknown learner (the message lists the learners that exist), no task
        with a comparable profile, or ``k`` not a positive integer.
    """
    k = _positive_int("k", k)
    found = similar_tasks(archive, prof, learner=learner, k=k, weights=weights, version=version)
    notes = found.attrs["notes"]
    ids = [int(t) for t in found["task_id"]]
    names = dict(
        archive.con.execute(f"SELECT task_id, name FROM tasks WHERE task_id IN {_placeholders(len(ids))}", ids).fetchall()
    ) if ids else {}
    found["task"] = [names.get(t, "") for t in ids]
    out = found.merge(_study_summary(archive, ids, learner), on="task_id", how="left")
    out = out[NEIGHBOR_COLUMNS].reset_index(drop=True)
    out.attrs["notes"] = notes
    return out


def defaults(
    archive,
    learner: str,
    near: Mapping[str, float] | None = None,
    n: int = 10,
    weights: Mapping[str, float] | None = None,
    version: str = PROFILE_VERSION,
    kind: str | None = None,
) -> pd.DataFrame:
    """Configs of ``learner`` that ranked well across many past tasks.

    Within each study a trial's score becomes its quantile (mid-rank over the
    study's successful trials, direction taken into account: 1 best, 0
    worst), so scales of different tasks and metrics do not mix. Configs are
    matched across studies by their canonical JSON (the archive stores it
    canonically: sorted keys, no spaces). A config's quantile is averaged
    over the studies of a task, then over tasks, optionally weighted by the
    tasks' similarity to ``near``.

    Parameters
    ----------
    archive : Archive
    learner : str
    near : mapping, optional
        A profile; tasks are weighted by their similarity to it (tasks
        without a comparable profile are left out).
    n : int, default 10
        How many configs.
    weights : mapping, optional
        Feature weights for the similarity (with ``near``).
    version : str, default PROFILE_VERSION
        Profile version of ``near``.
    kind : {"classification", "regression"}, optional
        Only tasks of this kind (a learner's parameters can differ by kind,
        e.g. svm's ``epsilon`` exists for regression only).

    Returns
    -------
    pandas.DataFrame
        Best first: config (dict), shrunk_quantile (the ranking key: the
        weighted mean with ``PSEUDO_TASKS`` neutral pseudo-task at 0.5, so a
        config seen on one task does not outrank one that is good on many),
        mean_quantile, n_tasks, trial_count and weight (share of the total task
        weight behind the config). ``attrs["notes"]`` says what was left out.
    """
    n = _positive_int("n", n)
    _check_learner(archive, learner)
    notes: list[str] = []
    task_weights = None
    if near is not None:
        found = similar_tasks(archive, near, learner=learner, weights=weights, version=version)
        notes = found.attrs["notes"]
        task_weights = pd.DataFrame({"task_id": found["task_id"].astype("int64"), "w": found["similarity"].astype(float)})
    frame = _ranked_configs(archive.con, learner, kind, task_weights, n)
    if frame.empty:
        notes = notes + [f"learner {learner!r} has no successful trials with a score"]
    frame["config"] = [json.loads(c) for c in frame["config"]]
    frame["n_tasks"] = frame["n_tasks"].astype("int64")
    frame["trial_count"] = frame["trial_count"].astype("int64")
    out = frame[DEFAULT_COLUMNS].reset_index(drop=True)
    out.attrs["notes"] = notes
    return out


def _ranked_configs(con, learner: str, kind: str | None, task_weights: pd.DataFrame | None, n: int) -> pd.DataFrame:
    """The SQL behind :func:`defaults`: within-study quantiles, averaged per task,
    then over tasks (weighted by ``task_weights``: task_id, w; equal when None)."""
    weighted = task_weights is not None
    if task_weights is None:
        task_weights = pd.DataFrame({"task_id": pd.Series(dtype="int64"), "w": pd.Series(dtype="float64")})
    view = f"_task_weights_{uuid.uuid4().hex}"  # a fixed prefix and hex digits: a safe identifier
    con.register(view, task_weights)
    try:
        return con.execute(
            f"""
            WITH ok AS (
                SELECT s.task_id, r.study_id, r.config,
                       CASE WHEN s.direction = 'maximize' THEN r.score ELSE -r.score END AS v
                FROM trials r JOIN studies s USING (study_id)
                WHERE s.learner = ? AND r.status = 'ok' AND r.score IS NOT NULL AND isfinite(r.score)
                  AND (CAST(? AS VARCHAR) IS NULL OR s.task_id IN (SELECT task_id FROM tasks WHERE kind = ?))
            ), q AS (
                SELECT task_id, config,
                       (rank() OVER (PARTITION BY study_id ORDER BY v) - 1
                        + 0.5 * count(*) OVER (PARTITION BY study_id, v))
                       / count(*) OVER (PARTITION BY study_id) AS quantile
                FROM ok
            ), per_task AS (
                SELECT q.task_id, q.config, avg(q.quantile) AS quantile, count(*) AS trial_count,
                       CASE WHEN ? THEN any_value(w.w) ELSE 1.0 END AS w
                FROM q LEFT JOIN {view} w USING (task_id)
                GROUP BY q.task_id, q.config
            ), usable AS (
                SELECT * FROM per_task WHERE w IS NOT NULL AND w > 0
            ), total AS (
                SELECT sum(w) AS total_w, avg(w) AS mean_w FROM (SELECT DISTINCT task_id, w FROM usable)
            )
            SELECT config,
                   (sum(w * quantile) + ? * 0.5 * any_value(mean_w)) / (sum(w) + ? * any_value(mean_w))
                       AS shrunk_quantile,
                   sum(w * quantile) / sum(w) AS mean_quantile,
                   count(*) AS n_tasks, sum(trial_count) AS trial_count,
                   sum(w) / any_value(total_w) AS weight
            FROM usable, total
            GROUP BY config
            ORDER BY shrunk_quantile DESC, n_tasks DESC, config
            LIMIT ?
            """,
            [learner, kind, kind, weighted, PSEUDO_TASKS, PSEUDO_TASKS, n],
        ).df()
    finally:
        con.unregister(view)
