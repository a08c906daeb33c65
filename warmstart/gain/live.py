"""Live protocol: warm and cold searches side by side on a real objective.

The target set comes from a reference sample of the space (a scrambled Sobol
design, which stands in for uniform sampling): its top ``gamma`` share
defines the threshold, and ``p`` is the share of the reference sample that
reaches it. Warm and cold searches then run ``repeats`` times each with
the same budget; every evaluation is cached by canonical config, so a
config met twice (by the reference sample or any run) is trained once per
process.

Further searches can run beside them on the same target set
(``searches``: seeded searches, ``repeats`` runs each; ``lists``: fixed
orders of configs, one run each, as in the replay) and are reported as
``bits_<label>`` beside warm and cold.

:func:`live_setup` builds what ``gain --data`` compares: the objective,
the prior from the archive's other tasks and the library default.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from warmstart.evaluate.workers import map_jobs
from warmstart.gain.bits import GainError, GainResult, Runs, compare, hits_and_regret, in_target, pool, target_threshold
from warmstart.gain.verdicts import judge
from warmstart.search.default_first import DefaultFirstSearch, LibraryDefault, library_default
from warmstart.search.density import DensitySearch
from warmstart.search.mixture import MixtureSearch
from warmstart.search.static import FixedListSearch
from warmstart.search.strategy import SearchStrategy, run_search
from warmstart.space import Space

__all__ = ["LiveResult", "LiveSetup", "live_gain", "live_setup"]


def _score(result: Any) -> float:
    """A float score from a number, a result object with ``.score``, or None."""
    value = getattr(result, "score", result)
    if value is None:
        return float("nan")
    value = float(value)
    return value if np.isfinite(value) else float("nan")


class _Cached:
    """``evaluate`` with its scores kept by canonical config in ``memo`` (shared by the runs
    of one process: the jobs of :func:`map_jobs` with one worker carry the same dict)."""

    def __init__(self, space: Space, evaluate: Callable, memo: dict[str, float] | None = None):
        self.space = space
        self.evaluate = evaluate
        self.memo: dict[str, float] = {} if memo is None else memo

    def __call__(self, config: dict) -> float:
        key = self.space.canonical_json(config)
        if key not in self.memo:
            self.memo[key] = _score(self.evaluate(config))
        return self.memo[key]


@dataclass(frozen=True, eq=False)
class _ArmJob:
    """One search on the live objective: warm (``prior`` set), cold, a
    default config first then cold (``default`` set), a further search
    (``make(seed=...)``) or a fixed list (``configs``)."""

    space: Space
    evaluate: Callable
    prior: Any
    budget: int
    seed: int
    maximize: bool
    default: Any = None
    make: Callable[..., SearchStrategy] | None = None
    configs: Sequence[Mapping] | None = None
    memo: dict | None = None


def _arm(job: _ArmJob) -> np.ndarray:
    """Scores of one search, query by query, NaN = failed or not made (module level, so worker
    processes can run it). A fixed list shorter than the budget leaves its last queries NaN:
    misses that find nothing, as in the replay."""
    if job.configs is not None:
        search = FixedListSearch(job.space, job.configs, maximize=job.maximize)
    elif job.make is not None:
        search = job.make(seed=job.seed)
    elif job.prior is not None:
        search = MixtureSearch(job.space, job.prior, seed=job.seed, maximize=job.maximize)
    elif job.default is not None:
        search = DefaultFirstSearch(job.space, job.default, seed=job.seed, maximize=job.maximize)
    else:
        search = DensitySearch(job.space, prior=None, seed=job.seed, maximize=job.maximize)
    n = min(job.budget, search.remaining) if isinstance(search, FixedListSearch) else job.budget
    scores = np.full(job.budget, np.nan)
    scores[:n] = run_search(search, _Cached(job.space, job.evaluate, job.memo), n).scores
    return scores


@dataclass(frozen=True)
class LiveSetup:
    """What a live comparison of one learner on one data table compares.

    Attributes
    ----------
    objective : CVObjective
        Cross-validated score of a config on the table (its ``space``,
        ``metric`` and ``maximize``).
    profile : dict
        The table's profile.
    prior : Prior
        Built from the archive's studies of the learner on other tasks.
    default : LibraryDefault
        The library's default config mapped into the space.
    excluded : list of int
        Archive tasks with the same fingerprint as the table (left out of the prior).
    kind : str
        ``classification`` or ``regression``.
    """

    objective: Any
    profile: dict
    prior: Any
    default: LibraryDefault
    excluded: list
    kind: str


def live_setup(archive, frame: pd.DataFrame, target: str, learner: str, metric: str | None = None,
               cv: int = 5, seed: int = 0, keep_columns: Sequence[str] = (),
               profile: Mapping[str, float] | None = None) -> LiveSetup:
    """The objective, prior and library default of ``gain --data`` for one learner.

    Parameters
    ----------
    archive : Archive
        Where the prior comes from; its tasks with the same fingerprint as
        ``frame`` (the same data) are left out.
    frame : DataFrame
        The table, target included.
    target, learner : str
    metric : str, optional
        A built-in metric; default accuracy (classification) or r2.
    cv : int, default 5
        Cross-validation folds.
    seed : int, default 0
        Seed of the folds and estimators.
    keep_columns : sequence of str, default ()
        Columns to keep though they look like identifiers.
    profile : mapping, optional
        The table's profile when already computed (else computed here).

    Returns
    -------
    LiveSetup

    Raises
    ------
    PriorError
        No past study of ``learner`` can be used (none, or only of this
        same data); the message says which and why.
    """
    from warmstart.archive.store import fingerprint
    from warmstart.evaluate.learners import cv_objective, get_learner
    from warmstart.profile import detect_kind
    from warmstart.profile import profile as profile_of

    kind = detect_kind(frame[target])
    objective = cv_objective(frame, target, learner, metric=metric, kind=kind, cv=cv, seed=seed,
                             keep_columns=keep_columns)
    tasks = archive.tasks()
    same = [int(t) for t in tasks.loc[tasks["fingerprint"] == fingerprint(frame, target), "task_id"]]
    prof = dict(profile) if profile is not None else profile_of(frame, target=target, kind=kind,
                                                                 keep_columns=keep_columns)
    prior = archive.build_prior(prof, learner=learner, space=objective.space, exclude_tasks=same)
    default = library_default(get_learner(learner, kind).defaults, objective.space, prof)
    return LiveSetup(objective, prof, prior, default, same, kind)


@dataclass
class LiveResult(GainResult):
    """Warm vs cold on one live objective, with the reference sample's scores
    and every search's hits (label -> bool array (runs, budget))."""

    reference_scores: np.ndarray | None = None
    hits: dict | None = None


def _reference_scores(space: Space, evaluate, n: int, seed: int, memo: dict, progress, total: int) -> np.ndarray:
    """Scores of the reference (Sobol) sample that defines the target set, kept in
    ``memo`` by canonical config so the searches do not train them again."""
    scores = np.empty(n)
    for i, cfg in enumerate(space.sobol(n, np.random.default_rng(seed + 10_007))):
        memo[space.canonical_json(cfg)] = scores[i] = _score(evaluate(cfg))
        if progress:
            progress(i + 1, total)
    return scores


def _arm_jobs(space, evaluate, prior, default, searches: dict, lists: dict, arms: tuple, budget: int,
              repeats: int, seed: int, maximize: bool, memo: dict) -> list:
    """``repeats`` runs of every seeded search (seeds ``seed + r``), then each fixed list once."""
    jobs = [_ArmJob(space, evaluate, prior if arm == "warm" else None, budget, seed + r, maximize,
                    default if arm == "library_default" else None, make=searches.get(arm), memo=memo)
            for arm in arms for r in range(repeats)]
    return jobs + [_ArmJob(space, evaluate, None, budget, seed, maximize, configs=list(configs), memo=memo)
                   for configs in lists.values()]


def _runs_by_label(outputs, arms: tuple, lists: list, repeats: int, threshold: float, ref_scores: np.ndarray,
                   maximize: bool) -> dict:
    """Hits and regret of every run, by search label: ``repeats`` rows per seeded
    search, then one per fixed list, in the order the jobs were made."""
    scores = np.array(outputs)
    # regret spans every score seen: the reference sample's and the searches'
    hits, regret = hits_and_regret(scores, threshold, np.concatenate([ref_scores, scores.ravel()]), maximize)
    rows = {arm: slice(i * repeats, (i + 1) * repeats) for i, arm in enumerate(arms)}
    rows.update({label: slice(len(arms) * repeats + j, len(arms) * repeats + j + 1) for j, label in enumerate(lists)})
    return {arm: Runs(hits[at], regret[at], arm) for arm, at in rows.items()}


def live_gain(
    space: Space,
    evaluate: Callable[[dict], Any],
    prior: Any,
    budget: int = 10,
    repeats: int = 5,
    gamma: float = 0.05,
    n_reference: int = 64,
    maximize: bool = True,
    seed: int = 0,
    workers: int = 1,
    task: str = "new task",
    learner: str = "",
    progress: Callable[[int, int], None] | None = None,
    default: Any = None,
    searches: Mapping[str, Callable[..., SearchStrategy]] | None = None,
    lists: Mapping[str, Sequence[Mapping]] | None = None,
) -> LiveResult:
    """Run warm and cold searches ``repeats`` times each and compare them.

    Parameters
    ----------
    space : Space
    evaluate : callable(config) -> float or result with ``.score``
        The objective; must be picklable when ``workers > 1``.
    prior : Prior
        The warm search's prior.
    budget, repeats : int
    gamma : float
        Target set: the top share of the reference sample.
    n_reference : int
        Size of the reference (Sobol) sample that defines the target set.
    maximize : bool
    seed : int
    workers : int
        Processes running searches in parallel.
    task, learner : str
        Labels for reports.
    progress : callable(done, total), optional
    default : mapping, optional
        A default config (scikit-learn's for a built-in learner, see
        :func:`~warmstart.search.default_first.library_default`, or one of the
        user's): adds the baseline ``library_default``, that config first and
        then a cold search, ``repeats`` times.
    searches : mapping of label -> callable, optional
        Further searches run ``repeats`` times each beside warm and cold
        (seeds ``seed + r`` as theirs): ``make(seed=s)`` returns a fresh
        :class:`~warmstart.search.strategy.SearchStrategy`; picklable when
        ``workers > 1`` (e.g. a :func:`functools.partial` of a class).
    lists : mapping of label -> sequence of configs, optional
        Fixed orders (e.g. :func:`~warmstart.search.static.average_rank_list`),
        run once each: a fixed order does not depend on a seed. A list
        shorter than ``budget`` misses on the queries it does not make.

    Returns
    -------
    LiveResult
        One task; the further searches' bits over uniform are in
        ``tasks[0].extra["bits_<label>"]`` and pooled in ``pooled.extra``.
    """
    searches, lists = dict(searches or {}), dict(lists or {})
    clash = sorted(set(searches) & set(lists) | (set(searches) | set(lists)) & {"warm", "cold", "library_default"})
    if clash:
        raise GainError(f"search labels must be distinct and not warm, cold or library_default; got {clash}")
    memo: dict[str, float] = {}
    arms = ("warm", "cold") + (("library_default",) if default is not None else ()) + tuple(searches)
    total = n_reference + len(arms) * repeats + len(lists)
    ref_scores = _reference_scores(space, evaluate, n_reference, seed, memo, progress, total)
    threshold = target_threshold(ref_scores, gamma, maximize)
    p = float(in_target(ref_scores, threshold, maximize).mean())
    jobs = _arm_jobs(space, evaluate, prior, default, searches, lists, arms, budget, repeats, seed, maximize, memo)
    outputs = map_jobs(_arm, jobs, workers, progress, done_before=n_reference, total=total)
    runs = _runs_by_label(outputs, arms, list(lists), repeats, threshold, ref_scores, maximize)
    others = {k: v for k, v in runs.items() if k not in ("warm", "cold")}
    result = judge([compare(task, runs["warm"], runs["cold"], p, rng=seed, others=others)])
    curves = {arm: (r.hits.mean(axis=0), r.regret.mean(axis=0)) for arm, r in runs.items()}
    return LiveResult(learner, budget, repeats, gamma, result, pool(result, rng=seed), curves, ref_scores,
                      {arm: r.hits for arm, r in runs.items()})
