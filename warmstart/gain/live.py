"""Live protocol: warm and cold searches side by side on a real objective.

The target set comes from a reference sample of the space (a scrambled Sobol
design, which stands in for uniform sampling): its top ``gamma`` share
defines the threshold, and ``p`` is the share of the reference sample that
reaches it. Warm and cold searches then run ``repeats`` times each with
the same budget; every evaluation is cached by canonical config, so a
config met twice is trained once per process.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from warmstart.evaluate.workers import map_jobs
from warmstart.gain.bits import GainResult, Runs, compare, hits_and_regret, in_target, pool, target_threshold
from warmstart.search.density import DensitySearch
from warmstart.search.strategy import run_search
from warmstart.space import Space

__all__ = ["LiveResult", "live_gain"]


def _score(result: Any) -> float:
    """A float score from a number, a result object with ``.score``, or None."""
    value = getattr(result, "score", result)
    if value is None:
        return float("nan")
    value = float(value)
    return value if np.isfinite(value) else float("nan")


class _Cached:
    def __init__(self, space: Space, evaluate: Callable):
        self.space = space
        self.evaluate = evaluate
        self.memo: dict[str, float] = {}

    def __call__(self, config: dict) -> float:
        key = self.space.canonical_json(config)
        if key not in self.memo:
            self.memo[key] = _score(self.evaluate(config))
        return self.memo[key]


@dataclass(frozen=True, eq=False)
class _ArmJob:
    """One warm (``prior`` set) or cold search on the live objective."""

    space: Space
    evaluate: Callable
    prior: Any
    budget: int
    seed: int
    maximize: bool


def _arm(job: _ArmJob) -> np.ndarray:
    """Scores of one search, query by query, NaN = failed (module level, so worker processes can run it)."""
    search = DensitySearch(job.space, prior=job.prior, seed=job.seed, maximize=job.maximize)
    return run_search(search, _Cached(job.space, job.evaluate), job.budget).scores


@dataclass
class LiveResult(GainResult):
    """Warm vs cold on one live objective, with the reference sample's scores."""

    reference_scores: np.ndarray | None = None


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
    """
    ref_cfgs = space.sobol(n_reference, np.random.default_rng(seed + 10_007))
    memo: dict[str, float] = {}
    ref_scores = np.empty(n_reference)
    total = n_reference + 2 * repeats
    for i, cfg in enumerate(ref_cfgs):
        key = space.canonical_json(cfg)
        memo[key] = ref_scores[i] = _score(evaluate(cfg))
        if progress:
            progress(i + 1, total)
    threshold = target_threshold(ref_scores, gamma, maximize)
    p = float(in_target(ref_scores, threshold, maximize).mean())
    jobs = [_ArmJob(space, evaluate, prior if arm == "warm" else None, budget, seed + r, maximize)
            for arm in ("warm", "cold") for r in range(repeats)]
    outputs = map_jobs(_arm, jobs, workers, progress, done_before=n_reference, total=total)
    scores = np.array(outputs)
    # regret spans every score seen: the reference sample's and the searches'
    hits, regret = hits_and_regret(scores, threshold, np.concatenate([ref_scores, scores.ravel()]), maximize)
    warm = Runs(hits[:repeats], regret[:repeats], "warm")
    cold = Runs(hits[repeats:], regret[repeats:], "cold")
    result = compare(task, warm, cold, p, rng=seed)
    curves = {"warm": (warm.hits.mean(axis=0), warm.regret.mean(axis=0)),
              "cold": (cold.hits.mean(axis=0), cold.regret.mean(axis=0))}
    return LiveResult(learner, budget, repeats, gamma, [result], pool([result], rng=seed), curves, ref_scores)
