"""Replay protocol: measure transfer on archived studies without training.

Leave-one-task-out: each archived study in turn is held out; its recorded
trials act as its objective (each query of a run evaluates the nearest
recorded config, in the unit cube, that the run has not evaluated yet:
:class:`~warmstart.gain.objectives.NearestReplayRun`), the prior is built
from every other task, and warm, cold and baseline searches run R times
each, every run on a fresh evaluator (``objective.new_run``). The target
set is the top ``gamma`` of the recorded configs, and ``p`` is their share
among the recorded configs: the per-query hit chance of uniform sampling
without replacement over what a run can evaluate. A budget above a task's
number of recorded configs is refused.

Baselines computed in the same run:

``random``
    uniform sampling (:class:`~warmstart.search.baselines.RandomSearch`);
``defaults``
    the average-rank order of past configs across all other tasks (a
    static list, "learned defaults": :func:`~warmstart.search.static.average_rank_list`);
``nearest``
    the best configs of the nearest tasks by profile distance, nearest
    first (the meta-feature nearest-datasets initialisation:
    :func:`~warmstart.search.static.nearest_tasks_list`);
``library_default``
    for a built-in learner, scikit-learn's default config mapped into the
    space, then a cold search (:class:`~warmstart.search.default_first.DefaultFirstSearch`):
    what a practitioner does without any history.

The warm search is the mixture of past tasks re-weighted at every result
(:class:`~warmstart.search.mixture.MixtureSearch`); the cold search a
:class:`~warmstart.search.density.DensitySearch` without a prior. With
``permuted=True`` each held-out task's recorded scores are first shuffled
among its configs (:func:`~warmstart.gain.control.permute_task`): a control
on which no transfer should gain.

Every one of them, warm and cold included, is a strategy object run through
:func:`~warmstart.search.strategy.run_search` on the held-out objective; the
scores it returns give the hits and regret (:func:`~warmstart.gain.bits.hits_and_regret`).
A static list shorter than the budget stops where it ends, and the queries it
did not make count as misses.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

import numpy as np
from threadpoolctl import threadpool_limits

from warmstart._checks import check_choice
from warmstart.errors import WarmstartError
from warmstart.evaluate.learners import get_learner
from warmstart.evaluate.workers import map_jobs
from warmstart.gain.bits import (HINDSIGHT_LABELS, GainResult, Runs, TaskGain, compare, hits_and_regret,
                                 in_target, pool, target_threshold)
from warmstart.gain.verdicts import judge
from warmstart.gain.objectives import HeldOutObjective, ReplayObjective, SurrogateObjective
from warmstart.prior import Prior, Source, prior_from_sources
from warmstart.archive.sources import load_sources, prior_info, prior_sources
from warmstart.search.baselines import RandomSearch
from warmstart.search.default_first import DefaultFirstSearch, library_default
from warmstart.search.density import DensitySearch
from warmstart.search.mixture import MixtureSearch
from warmstart.search.static import FixedListSearch, average_rank_list, nearest_tasks_list
from warmstart.search.strategy import SearchStrategy, run_search
from warmstart.space import Space

__all__ = ["ReplayTask", "ReplayResult", "replay_tasks", "leave_one_task_out",
           "hindsight_rates", "HINDSIGHT", "OBJECTIVES"]


@dataclass
class ReplayTask:
    """One archived study prepared for replay."""

    task_id: int
    task: str
    study_id: int
    space: Space
    objective: HeldOutObjective
    threshold: float
    p: float
    profile: dict


#: Replay objectives: the nearest recorded config not yet evaluated by the run, or a Gaussian-process surrogate.
OBJECTIVES = ("nearest", "surrogate")


@dataclass(frozen=True, eq=False)
class _Study:
    """One task's largest study of a learner, as read for replay."""

    task_id: int
    task: str
    study_id: int
    space: Space
    X: np.ndarray  # encoded configs of the successful trials
    scores: np.ndarray
    maximize: bool


@dataclass(frozen=True, eq=False)
class _ObjectiveJob:
    """Build one held-out study's objective (in a worker process)."""

    kind: str  # one of OBJECTIVES
    study: _Study


@dataclass(frozen=True, eq=False)
class _TaskJob:
    """Replay one held-out task: every search, ``repeats`` runs of ``budget`` queries."""

    task: ReplayTask
    prior: Prior
    budget: int
    repeats: int
    seed: int
    default: dict | None = None  # the library default config (None: no such baseline)


@dataclass(frozen=True, eq=False)
class _TaskOutcome:
    """What a worker hands back for one task: its gain and its mean curves
    (label -> (hit rate per query, regret per query))."""

    gain: TaskGain
    curves: dict


def _replay_studies(archive, learner: str, min_trials: int) -> list[_Study]:
    """Each task's largest study of ``learner`` with at least ``min_trials`` successful trials."""
    studies = archive.studies()
    studies = studies[(studies["learner"] == learner) & (studies["n_ok"] >= min_trials)]
    studies = studies.sort_values(["task_id", "n_ok"], ascending=[True, False]).drop_duplicates("task_id")
    profiles = archive.profiles()
    out = []
    for row in studies.itertuples(index=False):
        if row.task_id not in profiles.index:
            continue
        trials = archive.trials(int(row.study_id))
        trials = trials[trials["status"] == "ok"]
        space = archive.space(int(row.space_id))
        out.append(_Study(int(row.task_id), str(row.task), int(row.study_id), space,
                          space.encode(list(trials["config"])), trials["score"].to_numpy(dtype=float),
                          row.direction == "maximize"))
    return out


def _build_objective(job: _ObjectiveJob) -> HeldOutObjective:
    """The replay objective of one study (module level, so worker processes can run it)."""
    s = job.study
    if job.kind == "surrogate":
        # small matrices: one BLAS thread per process is faster than two processes fighting over cores
        with threadpool_limits(limits=1):
            return SurrogateObjective(s.space, s.X, s.scores, s.maximize, seed=s.task_id)
    return ReplayObjective(s.space, s.X, s.scores, s.maximize)


def replay_tasks(archive, learner: str, gamma: float = 0.05, min_trials: int = 20,
                 objective: str = "nearest", only: Sequence[str] | None = None, workers: int = 1,
                 progress: Callable[[int, int], None] | None = None,
                 total: int | None = None, executor=None) -> list[ReplayTask]:
    """Every task with a study of ``learner`` (its largest study) ready for replay.

    Parameters
    ----------
    archive : Archive
    learner : str
    gamma : float, default 0.05
        Size of the target set.
    min_trials : int, default 20
        Studies with fewer successful trials are left out.
    objective : {"nearest", "surrogate"}, default "nearest"
        ``nearest``: each query of a run scores what the nearest recorded
        config not yet evaluated by that run scored; the target set is the
        top ``gamma`` of the recorded configs, ``p`` their share.
        ``surrogate``: a Gaussian process fitted to the recorded trials
        (:class:`~warmstart.gain.objectives.SurrogateObjective`); the target set is
        the top ``gamma`` of the space under uniform sampling.
    only : sequence of str, optional
        Only these tasks (names).
    workers : int, default 1
        Processes fitting surrogates in parallel.
    progress : callable(done, total), optional
        Called after each surrogate is fitted (not for ``nearest``, which is quick).
    total : int, optional
        Total passed to ``progress`` when the fits are part of larger work.
    executor : concurrent.futures.Executor, optional
        Fit the surrogates there instead of in ``workers`` local processes
        (a Dask cluster's :class:`~warmstart.evaluate.cluster.ClusterPool`).
    """
    check_choice("replay objective", objective, OBJECTIVES, error=WarmstartError)
    studies = _replay_studies(archive, learner, min_trials)
    if only is not None:
        studies = [s for s in studies if s.task in set(only)]
    surrogate = objective == "surrogate"
    objectives = map_jobs(_build_objective, [_ObjectiveJob(objective, s) for s in studies],
                          workers if surrogate else 1, progress if surrogate else None, total=total,
                          executor=executor if surrogate else None)
    out = []
    for s, obj in zip(studies, objectives):
        threshold = target_threshold(obj.reference_scores, gamma, s.maximize)
        out.append(ReplayTask(
            s.task_id, s.task, s.study_id, s.space, obj, threshold,
            obj.uniform_hit_chance(threshold, rng=s.task_id + 1), archive.profile_of(s.task_id),
        ))
    return out


#: Labels of the hindsight figures :func:`hindsight_rates` adds (they are
#: not searches: each one peeks at the held-out task's scores).
HINDSIGHT = HINDSIGHT_LABELS


def hindsight_rates(task: ReplayTask, prior: Prior, budget: int) -> dict[str, float]:
    """Per-query hit rates two hindsight lists reach, to read the searches by.

    ``best_past_task``: the top ``budget`` configs of the one past task
    whose list hits most often on the held-out task, picked after the fact
    (what a perfect choice of a single neighbor would give). ``ideal_list``:
    every recorded target config first, ``min(|T|, B) / B`` under the
    nearest replay (the most any run can reach there, as a run evaluates a
    recorded config at most once); 1 under the surrogate, whose target set
    is a region.
    """
    obj = task.objective
    n_hit = obj.max_distinct_hits(task.threshold, budget)
    space = prior.space
    lists = [[space.complete(c, 0) for c in space.decode(s.X[np.argsort(-s.quantile, kind="stable")[:budget]])]
             for s in prior.sources]
    # not searches, so not run through run_search: every list is scored at once
    # each list is queried in order by a run of its own (under the nearest replay a run evaluates a recorded
    # config at most once, so two configs of a list near one recorded config are not both scored by it)
    best = max((int(in_target(obj.new_run(len(configs)).values(task.space.encode(configs)), task.threshold,
                              obj.maximize).sum()) for configs in lists if configs), default=0) / budget
    return {"best_past_task": best, "ideal_list": n_hit / budget}


def _runs(task: ReplayTask, searches: Iterable[SearchStrategy], budget: int) -> Runs:
    """Run each search on the held-out task through :func:`run_search` and score its queries.

    A search runs ``budget`` queries; a :class:`FixedListSearch` runs as
    many as its list holds, and the queries it did not make count as misses
    that find nothing (no hit, regret unchanged). Each run evaluates its own
    ``task.objective.new_run``, so no state passes from one run to the next.
    """
    rows = []
    for search in searches:
        n = min(budget, search.remaining) if isinstance(search, FixedListSearch) else budget
        scores = np.full(budget, np.nan)
        scores[:n] = run_search(search, task.objective.new_run(n), n).scores  # a fresh evaluator per run
        rows.append(scores)
    obj = task.objective
    hits, regret = hits_and_regret(np.array(rows), task.threshold, obj.reference_scores, obj.maximize)
    return Runs(hits, regret)


def _one_task(job: _TaskJob) -> _TaskOutcome:
    """Replay one held-out task (module level, so worker processes can run it)."""
    with threadpool_limits(limits=1):  # small matrices: see _build_objective
        return _replay_one_task(job.task, job.prior, job.budget, job.repeats, job.seed, job.default)


def _replay_one_task(task: ReplayTask, prior: Prior, budget: int, repeats: int, seed: int,
                     default: dict | None = None) -> _TaskOutcome:
    space, maximize = task.space, task.objective.maximize

    def repeated(make: Callable[[int], SearchStrategy]) -> Runs:
        return _runs(task, (make(seed + r) for r in range(repeats)), budget)

    warm = repeated(lambda s: MixtureSearch(space, prior, seed=s, maximize=maximize))
    cold = repeated(lambda s: DensitySearch(space, prior=None, seed=s, maximize=maximize))
    rand = repeated(lambda s: RandomSearch(space, seed=s, maximize=maximize))
    others = {"random": rand}
    curves = {"warm": warm, "cold": cold, "random": rand}
    if default is not None:
        others["library_default"] = curves["library_default"] = repeated(
            lambda s: DefaultFirstSearch(space, default, seed=s, maximize=maximize))
    for label, configs in (("defaults", average_rank_list(prior, budget)),
                           ("nearest", nearest_tasks_list(prior, budget))):
        others[label] = curves[label] = _runs(task, [FixedListSearch(space, configs, maximize=maximize)], budget)
    result = compare(task.task, warm, cold, task.p, rng=seed, others=others)
    for label, q in hindsight_rates(task, prior, budget).items():
        result.extra[f"q_{label}"] = q
        result.extra[f"bits_{label}"] = math.log2(max(q, 0.5 / (budget + 1)) / task.p)
    sign = 1.0 if maximize else -1.0
    best = float(np.max(sign * task.objective.reference_scores))
    gap = best - sign * task.threshold
    result.extra["target_gap"] = gap
    # rule of thumb (common practice): CV estimates on small data move by about a point
    result.extra["within_noise"] = bool(gap < 0.01 * max(abs(best), 1e-12))
    return _TaskOutcome(result, {k: (v.hits.mean(axis=0), v.regret.mean(axis=0)) for k, v in curves.items()})


def _library_default(learner: str, task: ReplayTask) -> dict | None:
    """scikit-learn's default config of a built-in learner in the task's space (None otherwise)."""
    from warmstart.profile import profile_kind

    try:
        defaults = get_learner(learner, profile_kind(task.profile)).defaults
        return library_default(defaults, task.space, task.profile).config
    except WarmstartError:  # a learner label of the user's, or a space its defaults do not fit
        return None


@dataclass
class ReplayResult(GainResult):
    """Leave-one-task-out replay of one learner (see :class:`~warmstart.gain.bits.GainResult`).

    ``objective`` names how proposals were scored (see :func:`replay_tasks`).
    """

    objective: str = "nearest"
    permuted: bool = False


def _held_out_names(archive, learner: str, tasks: Sequence[str] | None) -> list[str]:
    """The tasks with a replayable study of ``learner`` (only ``tasks``, when given)."""
    names = [s.task for s in _replay_studies(archive, learner, 20)]
    if len(names) < 2:
        raise WarmstartError(
            f"replay needs studies of {learner!r} on at least 2 tasks with >= 20 successful trials; "
            f"found {len(names)}"
        )
    if tasks is not None:
        unknown = sorted(set(tasks) - set(names))
        if len(unknown) == len(set(tasks)):
            shown = ", ".join(repr(n) for n in sorted(names)[:12]) + (" ..." if len(names) > 12 else "")
            raise WarmstartError(
                f"no replayable study of {learner!r} on task(s) {', '.join(map(repr, unknown))}; "
                f"tasks with one: {shown}"
            )
        names = [n for n in names if n in set(tasks)]
    return names


def _check_budget(chosen, budget: int, learner: str) -> None:
    """Refuse a budget above a held-out task's recorded configs (the nearest replay
    evaluates each at most once per run)."""
    short = sorted((t for t in chosen if t.objective.max_budget is not None and t.objective.max_budget < budget),
                   key=lambda t: t.objective.max_budget)
    if short:
        least = short[0].objective.max_budget
        shown = ", ".join(f"{t.task!r} ({t.objective.max_budget})" for t in short[:5]) + (" ..." if len(short) > 5 else "")
        raise WarmstartError(
            f"budget {budget} is above the number of recorded configs of {len(short)} held-out task(s) of "
            f"{learner!r}: {shown}; the nearest replay evaluates each recorded config at most once per run, so "
            f"lower the budget to at most {least}, leave those tasks out (--task), or use the surrogate replay"
        )


def _task_jobs(archive, learner: str, chosen, budget: int, repeats: int, seed: int) -> list:
    """One job per held-out task, its prior built from every other task (sources
    loaded once per space)."""
    cache: dict[str, list[Source]] = {}
    jobs = []
    for t in chosen:
        key = t.space.content_hash
        if key not in cache:
            cache[key] = load_sources(archive, learner, t.space)
        weighted = prior_sources(archive, t.profile, learner, t.space, exclude_tasks=[t.task_id], loaded=cache[key])
        prior = prior_from_sources(t.space, weighted, provenance={**prior_info(learner), "held_out": t.task})
        jobs.append(_TaskJob(t, prior, budget, repeats, seed, _library_default(learner, t)))
    return jobs


def leave_one_task_out(
    archive,
    learner: str,
    budget: int = 10,
    repeats: int = 30,
    gamma: float = 0.05,
    seed: int = 0,
    workers: int = 1,
    progress: Callable[[int, int], None] | None = None,
    tasks: Sequence[str] | None = None,
    objective: str = "nearest",
    executor=None,
    permuted: bool = False,
) -> ReplayResult:
    """Replay every archived study of ``learner`` with the task held out.

    Parameters
    ----------
    archive : Archive
    learner : str
    budget : int, default 10
        Queries per search; under the nearest replay at most every held-out
        task's number of recorded configs (a larger one is refused).
    repeats : int, default 30
        Independent runs per search and task.
    gamma : float, default 0.05
        Size of the target set (top share of the recorded configs).
    seed : int
    workers : int, default 1
        Processes evaluating tasks in parallel.
    progress : callable(done, total), optional
    tasks : sequence of str, optional
        Only these held-out tasks (names).
    objective : {"nearest", "surrogate"}, default "nearest"
        How the held-out task's recorded trials score a proposal (see
        :func:`replay_tasks`).
    executor : concurrent.futures.Executor, optional
        Replay the held-out tasks there instead of in ``workers`` local
        processes (a Dask cluster's :class:`~warmstart.evaluate.cluster.ClusterPool`).
        Each task's job carries its seed, so the figures are the same.
    permuted : bool, default False
        The control: shuffle each held-out task's recorded scores among its
        configs first (:func:`~warmstart.gain.control.permute_task`, seeded
        by ``seed`` and the task), so no past task can tell anything about it.

    Returns
    -------
    ReplayResult
    """
    check_choice("replay objective", objective, OBJECTIVES, error=WarmstartError)
    names = _held_out_names(archive, learner, tasks)
    # a surrogate fit counts as one unit of work, as does replaying a task
    fits = len(names) if objective == "surrogate" else 0
    chosen = replay_tasks(archive, learner, gamma, objective=objective, only=names, workers=workers,
                          progress=progress, total=fits + len(names), executor=executor)
    _check_budget(chosen, budget, learner)
    if permuted:
        from warmstart.gain.control import permute_task

        chosen = [permute_task(t, np.random.default_rng([seed, t.task_id]), gamma) for t in chosen]
    jobs = _task_jobs(archive, learner, chosen, budget, repeats, seed)
    results = map_jobs(_one_task, jobs, workers, progress, done_before=fits, total=fits + len(jobs),
                       executor=executor)
    gains = judge([r.gain for r in results])
    curves = {}
    for label in results[0].curves:
        curves[label] = (
            np.mean([r.curves[label][0] for r in results], axis=0),
            np.mean([r.curves[label][1] for r in results], axis=0),
        )
    return ReplayResult(learner, budget, repeats, gamma, gains, pool(gains, rng=seed), curves, objective, permuted)
