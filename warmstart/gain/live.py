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
from warmstart.gain.verdicts import judge
from warmstart.search.default_first import DefaultFirstSearch
from warmstart.search.density import DensitySearch
from warmstart.search.mixture import MixtureSearch
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
    """One search on the live objective: warm (``prior`` set), cold, or a
    default config first then cold (``default`` set)."""

    space: Space
    evaluate: Callable
    prior: Any
    budget: int
    seed: int
    maximize: bool
    default: Any = None


def _arm(job: _ArmJob) -> np.ndarray:
    """Scores of one search, query by query, NaN = failed (module level, so worker processes can run it)."""
    if job.prior is not None:
        search = MixtureSearch(job.space, job.prior, seed=job.seed, maximize=job.maximize)
    elif job.default is not None:
        search = DefaultFirstSearch(job.space, job.default, seed=job.seed, maximize=job.maximize)
    else:
        search = DensitySearch(job.space, prior=None, seed=job.seed, maximize=job.maximize)
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
    default: Any = None,
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
    """
    ref_cfgs = space.sobol(n_reference, np.random.default_rng(seed + 10_007))
    memo: dict[str, float] = {}
    ref_scores = np.empty(n_reference)
    arms = ("warm", "cold") + (("library_default",) if default is not None else ())
    total = n_reference + len(arms) * repeats
    for i, cfg in enumerate(ref_cfgs):
        key = space.canonical_json(cfg)
        memo[key] = ref_scores[i] = _score(evaluate(cfg))
        if progress:
            progress(i + 1, total)
    threshold = target_threshold(ref_scores, gamma, maximize)
    p = float(in_target(ref_scores, threshold, maximize).mean())
    jobs = [_ArmJob(space, evaluate, prior if arm == "warm" else None, budget, seed + r, maximize,
                    default if arm == "library_default" else None)
            for arm in arms for r in range(repeats)]
    outputs = map_jobs(_arm, jobs, workers, progress, done_before=n_reference, total=total)
    scores = np.array(outputs)
    # regret spans every score seen: the reference sample's and the searches'
    hits, regret = hits_and_regret(scores, threshold, np.concatenate([ref_scores, scores.ravel()]), maximize)
    runs = {arm: Runs(hits[i * repeats:(i + 1) * repeats], regret[i * repeats:(i + 1) * repeats], arm)
            for i, arm in enumerate(arms)}
    others = {k: v for k, v in runs.items() if k not in ("warm", "cold")}
    result = judge([compare(task, runs["warm"], runs["cold"], p, rng=seed, others=others)])
    curves = {arm: (r.hits.mean(axis=0), r.regret.mean(axis=0)) for arm, r in runs.items()}
    return LiveResult(learner, budget, repeats, gamma, result, pool(result, rng=seed), curves, ref_scores)
