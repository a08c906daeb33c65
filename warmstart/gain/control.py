"""A control that must fail to gain: replay on tasks whose scores were permuted.

Permuting a held-out study's recorded scores among its configs keeps the
score distribution (so the target threshold) and breaks every link between
a config and its score, and so between the task and every past task. The
target set then is a uniformly random set of its size among the recorded
configs.

Under the nearest replay a run evaluates each recorded config at most once
(:class:`~warmstart.gain.objectives.NearestReplayRun`), and its ``p`` is the
target share of the recorded configs. Then *every* search, fixed list or
adaptive, warm or cold, lands in the target set with expected per-query
rate exactly ``p`` on a permuted task (the argument is in
:class:`~warmstart.gain.objectives.NearestReplayRun`): its bits over uniform
are at most 0 in expectation, and by Markov's inequality the share of
permutations on which it gains ``b`` bits or more is at most ``2**-b`` (the
conservation-of-information bound). A warm search's gain over cold stays
at or below 0 within its interval.

That bound is a statement about the nearest replay, where the targets are
a uniformly random set of recorded configs. The surrogate replay does not
hold it: a Gaussian process fitted to permuted scores peaks at the recorded
configs with high scores and lies near its mean between them, so recorded
configs reach its target set far more often than uniform draws (measured
on the starter history, svm: 18-32 % of them against p of about 5 %), and
lists or searches that propose recorded configs (as the static lists do
when past studies share the held-out study's design) score bits there that
no transfer earned (docs/experiments.md, 2026-12-04).
"""

from __future__ import annotations

import dataclasses
from typing import Any, Sequence

import numpy as np

from warmstart.gain.bits import N_BOOT, GainError, target_threshold

__all__ = ["permute_task", "share_at_least", "markov_bound", "pooled_bits_interval"]


def permute_task(task, rng: Any = None, gamma: float = 0.05):
    """A copy of a replay task whose recorded scores are randomly permuted.

    Parameters
    ----------
    task : ReplayTask
        A task of :func:`warmstart.gain.replay.replay_tasks` (nearest or
        surrogate objective).
    rng : seed or numpy Generator
    gamma : float, default 0.05
        Size of the target set (as in the replay).

    Returns
    -------
    ReplayTask
        Same task, space and profile; its objective scores each recorded
        config with another's score; threshold and ``p`` recomputed.
    """
    rng = np.random.default_rng(rng)
    obj = task.objective
    if hasattr(obj, "recorded_scores"):  # a surrogate: fit it again to the permuted scores
        from warmstart.gain.objectives import SurrogateObjective

        scores = rng.permutation(obj.recorded_scores)
        new = SurrogateObjective(task.space, obj.X, scores, obj.maximize, seed=int(rng.integers(2**31 - 1)))
    else:
        new = type(obj)(task.space, obj.X, rng.permutation(obj.scores), obj.maximize)
    threshold = target_threshold(new.reference_scores, gamma, obj.maximize)
    p = new.uniform_hit_chance(threshold, rng=int(rng.integers(2**31 - 1)))
    return dataclasses.replace(task, objective=new, threshold=threshold, p=p)


def share_at_least(bits: Sequence[float], b: float) -> float:
    """Share of the values that reach ``b`` bits."""
    x = np.asarray(bits, dtype=float)
    return float(np.mean(x >= b)) if x.size else float("nan")


def markov_bound(b: float) -> float:
    """``2**-b``: the most a fixed search may reach ``b`` bits on random target sets."""
    return float(2.0 ** -b)


def pooled_bits_interval(q: Sequence[float], p: Sequence[float], rng: Any = 0,
                         n_boot: int = N_BOOT) -> tuple[float, float, float]:
    """Pooled bits over uniform of one search across tasks, with a bootstrap 95 % interval.

    The pooled figure is ``log2(mean q / mean p)`` (as in
    :func:`~warmstart.gain.bits.pool`); the interval is the percentile
    bootstrap over tasks (tasks resampled with their ``p``). The control
    passes when the interval's low end is at or below 0.

    Parameters
    ----------
    q : sequence of float
        Per-task hit rates of the search (each in [0, 1], unsmoothed: a
        smoothed miss of a list run once is about ``p`` itself and would lift
        the pooled figure).
    p : sequence of float
        Per-task uniform hit chances, same order (each in (0, 1]).
    rng : seed or numpy Generator, default 0
    n_boot : int, default N_BOOT

    Returns
    -------
    (bits, low, high)
    """
    q = np.asarray(q, dtype=float)
    p = np.asarray(p, dtype=float)
    if q.ndim != 1 or q.shape != p.shape or q.size == 0:
        raise GainError(f"q and p need one value per task each; got shapes {q.shape} and {p.shape}")
    if not (np.all((q >= 0) & (q <= 1)) and np.all((p > 0) & (p <= 1))):
        raise GainError(f"every q must lie in [0, 1] and every p in (0, 1]; got q from {q.min()!r} to "
                        f"{q.max()!r}, p from {p.min()!r} to {p.max()!r}")
    if not q.any():
        raise GainError("no task has a hit: smooth zero hit rates first (the pooled bits would be -inf)")
    idx = np.random.default_rng(rng).integers(0, q.size, size=(n_boot, q.size))
    with np.errstate(divide="ignore"):  # a resample of tasks without a hit: -inf bits, a valid lower end
        boot = np.log2(q[idx].mean(axis=1) / p[idx].mean(axis=1))
    low, high = np.percentile(boot, [2.5, 97.5], method="inverted_cdf")  # no interpolation with -inf
    return float(np.log2(q.mean() / p.mean())), float(low), float(high)
