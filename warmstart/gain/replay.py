"""Replay protocol: measure transfer on archived studies without training.

Leave-one-task-out: each archived study in turn is held out; its recorded
trials act as its objective (a proposed config scores what its nearest
recorded config scored, in the unit cube), the prior is built from every
other task, and warm, cold and baseline searches run R times each. The
target set is the top ``gamma`` of the recorded configs, and ``p`` is
estimated by pushing uniform draws through the same nearest-config map, so
``p`` is exactly the uniform chance of a hit under the replay objective.

Baselines computed in the same run:

``random``
    uniform sampling;
``defaults``
    the average-rank order of past configs across all other tasks (a
    static list, "learned defaults");
``nearest``
    the best configs of the nearest tasks by profile distance, nearest
    first (the meta-feature nearest-datasets initialisation).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from warmstart.errors import WarmstartError
from warmstart.evaluate.workers import map_jobs
from warmstart.gain.bits import GainResult, Runs, TaskGain, compare, in_target, pool, target_threshold
from warmstart.prior import Prior, Source, prior_from_sources, unit_distances
from warmstart.archive.sources import load_sources, prior_info, prior_sources
from warmstart.space import Space

__all__ = ["ReplayObjective", "ReplayTask", "ReplayResult", "replay_tasks", "leave_one_task_out", "static_order",
           "hindsight_rates", "HINDSIGHT", "OBJECTIVES"]


class ReplayObjective:
    """A held-out study's recorded trials acting as its objective.

    Parameters
    ----------
    space : Space
    X : ndarray (m, d)
        Encoded recorded configs (successful trials).
    scores : ndarray (m,)
    maximize : bool
    """

    def __init__(self, space: Space, X: np.ndarray, scores: np.ndarray, maximize: bool = True):
        self.space = space
        self.X = np.asarray(X, dtype=float)
        self.scores = np.asarray(scores, dtype=float)
        self.maximize = maximize

    @property
    def reference_scores(self) -> np.ndarray:
        """The task's scores under uniform sampling: the recorded ones."""
        return self.scores

    def nearest(self, rows: np.ndarray) -> np.ndarray:
        """Index of the nearest recorded config for each encoded row."""
        return np.argmin(unit_distances(self.space, np.atleast_2d(rows), self.X), axis=1)

    def values(self, rows: np.ndarray) -> np.ndarray:
        """Scores of encoded rows: those of their nearest recorded configs."""
        return self.scores[self.nearest(rows)]

    def __call__(self, config: dict) -> float:
        return float(self.values(self.space.encode([config]))[0])

    def max_distinct_hits(self, threshold: float, budget: int) -> int:
        """Most hits ``budget`` distinct recorded configs can score: ``min(|T|, B)``."""
        return min(int(in_target(self.scores, threshold, self.maximize).sum()), budget)

    def uniform_hit_chance(self, threshold: float, n: int = 4096, rng: Any = 0) -> float:
        """``p``: chance that a uniform draw's nearest recorded config is a hit."""
        rows = self.space.sample_unit(n, np.random.default_rng(rng))
        hit = in_target(self.values(rows), threshold, self.maximize)
        return float(max(hit.mean(), 0.5 / (n + 1)))


@dataclass
class ReplayTask:
    """One archived study prepared for replay."""

    task_id: int
    task: str
    study_id: int
    space: Space
    objective: ReplayObjective
    threshold: float
    p: float
    profile: dict


#: Replay objectives: the nearest recorded config, or a Gaussian-process surrogate.
OBJECTIVES = ("nearest", "surrogate")


def _replay_specs(archive, learner: str, min_trials: int) -> list[tuple]:
    """Each task's largest study of ``learner``: (task_id, task, study_id, space, X, scores, maximize)."""
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
        out.append((int(row.task_id), str(row.task), int(row.study_id), space,
                    space.encode(list(trials["config"])), trials["score"].to_numpy(dtype=float),
                    row.direction == "maximize"))
    return out


def _build_objective(args):
    """The replay objective of one study (module level, so worker processes can run it)."""
    objective, space, X, scores, maximize, seed = args
    if objective == "surrogate":
        from threadpoolctl import threadpool_limits

        from warmstart.gain.objectives import SurrogateObjective

        # small matrices: one BLAS thread per process is faster than two processes fighting over cores
        with threadpool_limits(limits=1):
            return SurrogateObjective(space, X, scores, maximize, seed=seed)
    return ReplayObjective(space, X, scores, maximize)


def replay_tasks(archive, learner: str, gamma: float = 0.05, min_trials: int = 20,
                 objective: str = "nearest", only: Sequence[str] | None = None, workers: int = 1,
                 progress: Callable[[int, int], None] | None = None,
                 total: int | None = None) -> list[ReplayTask]:
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
        ``nearest``: a config scores what its nearest recorded config scored;
        the target set is the top ``gamma`` of the recorded configs.
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
    """
    if objective not in OBJECTIVES:
        raise WarmstartError(f"replay objective must be one of {', '.join(OBJECTIVES)}; got {objective!r}")
    specs = _replay_specs(archive, learner, min_trials)
    if only is not None:
        specs = [sp for sp in specs if sp[1] in set(only)]
    surrogate = objective == "surrogate"
    objectives = map_jobs(_build_objective, [(objective, sp[3], sp[4], sp[5], sp[6], sp[0]) for sp in specs],
                          workers if surrogate else 1, progress if surrogate else None, total=total)
    out = []
    for (task_id, task, study_id, space, _, _, maximize), obj in zip(specs, objectives):
        threshold = target_threshold(obj.reference_scores, gamma, maximize)
        out.append(ReplayTask(
            task_id, task, study_id, space, obj, threshold,
            obj.uniform_hit_chance(threshold, rng=task_id + 1), archive.profile_of(task_id),
        ))
    return out


def static_order(prior: Prior, flat: bool, budget: int) -> list[dict]:
    """A fixed list of configs from the prior's candidates.

    ``flat=True``: ranked by the mean quantile across all sources (average
    rank, "learned defaults"). ``flat=False``: the best config of each source
    in order of profile distance, then the second best of each, and so on.
    """
    if flat:
        scores = prior._Q.mean(axis=1)
        order = np.argsort(-scores, kind="stable")[:budget]
        return prior.space.decode(prior._candidates[order])
    by_distance = sorted(prior.sources, key=lambda s: (s.distance, s.study_id))
    out, keys, depth = [], set(), 0
    while len(out) < budget and depth < max(s.X.shape[0] for s in by_distance):
        for s in by_distance:
            order = np.argsort(-s.quantile, kind="stable")
            if depth < len(order):
                cfg = prior.space.complete(prior.space.decode(s.X[order[depth]][None, :])[0], 0)
                key = prior.space.canonical_json(cfg)
                if key not in keys:
                    keys.add(key)
                    out.append(cfg)
            if len(out) >= budget:
                break
        depth += 1
    return out


#: Labels of the hindsight figures :func:`hindsight_rates` adds (they are
#: not searches: each one peeks at the held-out task's scores).
HINDSIGHT = ("best_past_task", "ideal_list")


def hindsight_rates(task: ReplayTask, prior: Prior, budget: int) -> dict[str, float]:
    """Per-query hit rates two hindsight lists reach, to read the searches by.

    ``best_past_task``: the top ``budget`` configs of the one past task
    whose list hits most often on the held-out task, picked after the fact
    (what a perfect choice of a single neighbor would give). ``ideal_list``:
    every recorded target config first, ``min(|T|, B) / B`` under the
    nearest-config objective (the most any list of distinct recorded configs
    can reach; a search can exceed it by returning near a hit); 1 under the
    surrogate, whose target set is a region.
    """
    n_hit = task.objective.max_distinct_hits(task.threshold, budget)
    best = 0.0
    for s in prior.sources:
        order = np.argsort(-s.quantile, kind="stable")[:budget]
        configs = [prior.space.complete(c, 0) for c in prior.space.decode(s.X[order])]
        hits, _ = _score_configs(task, configs)
        best = max(best, float(hits.sum()) / budget)
    return {"best_past_task": best, "ideal_list": n_hit / budget}


def _score_configs(task: ReplayTask, configs: Sequence[dict]) -> tuple[np.ndarray, np.ndarray]:
    """Hits and normalised best-so-far regret of a sequence of configs."""
    obj = task.objective
    scores = obj.values(task.space.encode(configs))
    hits = in_target(scores, task.threshold, obj.maximize)
    sign = 1.0 if obj.maximize else -1.0
    best, worst = np.max(sign * obj.reference_scores), np.min(sign * obj.reference_scores)
    span = best - worst if best > worst else 1.0
    regret = np.maximum(best - np.maximum.accumulate(sign * scores), 0.0) / span
    return hits, regret


def _run(task: ReplayTask, make: Callable[[int], Any], budget: int, repeats: int, seed: int) -> Runs:
    hits = np.zeros((repeats, budget), dtype=bool)
    regret = np.zeros((repeats, budget))
    for r in range(repeats):
        search = make(seed + r)
        configs = []
        for _ in range(budget):
            config = search.propose()
            search.record(config, task.objective(config))
            configs.append(config)
        hits[r], regret[r] = _score_configs(task, configs)
    return Runs(hits, regret)


def _uniform_runs(task: ReplayTask, budget: int, repeats: int, seed: int) -> Runs:
    """Uniform sampling (the random baseline), R independent runs."""
    hits = np.zeros((repeats, budget), dtype=bool)
    regret = np.zeros((repeats, budget))
    for r in range(repeats):
        hits[r], regret[r] = _score_configs(task, task.space.sample(budget, np.random.default_rng(seed + r)))
    return Runs(hits, regret)


def _one_task(args) -> tuple[TaskGain, dict]:
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):  # small matrices: see _build_objective
        return _replay_one_task(*args)


def _replay_one_task(task: ReplayTask, prior: Prior, budget: int, repeats: int, seed: int) -> tuple[TaskGain, dict]:
    from warmstart.search.density import DensitySearch

    maximize = task.objective.maximize
    warm = _run(task, lambda s: DensitySearch(task.space, prior=prior, seed=s, maximize=maximize), budget, repeats, seed)
    cold = _run(task, lambda s: DensitySearch(task.space, prior=None, seed=s, maximize=maximize), budget, repeats, seed)
    rand = _uniform_runs(task, budget, repeats, seed)
    others = {"random": rand}
    curves = {"warm": warm, "cold": cold, "random": rand}
    for label, flat in (("defaults", True), ("nearest", False)):
        h, g = _score_configs(task, static_order(prior, flat, budget))
        h = np.pad(h, (0, budget - len(h)))
        g = np.pad(g, (0, budget - len(g)), constant_values=g[-1] if len(g) else 1.0)
        others[label] = Runs(h[None, :], g[None, :])
        curves[label] = others[label]
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
    return result, {k: (v.hits.mean(axis=0), v.regret.mean(axis=0)) for k, v in curves.items()}


@dataclass
class ReplayResult(GainResult):
    """Leave-one-task-out replay of one learner (see :class:`~warmstart.gain.bits.GainResult`).

    ``objective`` names how proposals were scored (see :func:`replay_tasks`).
    """

    objective: str = "nearest"


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
) -> ReplayResult:
    """Replay every archived study of ``learner`` with the task held out.

    Parameters
    ----------
    archive : Archive
    learner : str
    budget : int, default 10
        Queries per search.
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

    Returns
    -------
    ReplayResult
    """
    if objective not in OBJECTIVES:
        raise WarmstartError(f"replay objective must be one of {', '.join(OBJECTIVES)}; got {objective!r}")
    names = [sp[1] for sp in _replay_specs(archive, learner, 20)]
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
    # a surrogate fit counts as one unit of work, as does replaying a task
    fits = len(names) if objective == "surrogate" else 0
    chosen = replay_tasks(archive, learner, gamma, objective=objective, only=names, workers=workers,
                          progress=progress, total=fits + len(names))
    cache: dict[str, list[Source]] = {}
    jobs = []
    for t in chosen:
        key = t.space.content_hash
        if key not in cache:
            cache[key] = load_sources(archive, learner, t.space)
        weighted = prior_sources(archive, t.profile, learner, t.space, exclude_tasks=[t.task_id], loaded=cache[key])
        prior = prior_from_sources(t.space, weighted, provenance={**prior_info(learner), "held_out": t.task})
        jobs.append((t, prior, budget, repeats, seed))
    results = map_jobs(_one_task, jobs, workers, progress, done_before=fits, total=fits + len(jobs))
    gains = [r[0] for r in results]
    curves = {}
    for label in results[0][1]:
        curves[label] = (
            np.mean([r[1][label][0] for r in results], axis=0),
            np.mean([r[1][label][1] for r in results], axis=0),
        )
    return ReplayResult(learner, budget, repeats, gamma, gains, pool(gains, rng=seed), curves, objective)
