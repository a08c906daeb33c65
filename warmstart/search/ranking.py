"""How far to trust each past task: ranking-loss weights and greedy coverage.

Two pure computations the mixture search (:mod:`warmstart.search.mixture`)
is built on, kept apart so they can be tested on their own:

:func:`ranking_weights`
    weights of several models (past tasks and the new task's own) from how
    well each one orders the configs the new task has scored: the share of
    bootstrap resamples of the scored configs in which the model misranks
    the fewest pairs (ranking-loss weights, Feurer, Letham & Bakshy, 2018),
    with their weight-dilution rule;
:func:`greedy_cover`
    the next config of a start that covers the top sets of as many
    weighted past tasks as possible (greedy coverage, Wistuba, Schilling &
    Schmidt-Thieme, 2015).
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["misranked_pairs", "ranking_weights", "ranking_losses", "luck_losses", "weights_from_losses",
           "chance_share", "greedy_cover"]


def misranked_pairs(predictions: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """Pairwise ranking errors of several models, shape (m, n, n).

    Entry ``[k, a, b]`` is 1 when config ``a`` scored better than config ``b``
    but model ``k`` predicts it lower, 0.5 when the model predicts a tie,
    and 0 otherwise (also when ``a`` did not score better).

    Parameters
    ----------
    predictions : array of shape (n, m)
        What each of ``m`` models predicts at each of ``n`` scored configs
        (larger = better). NaN counts as a tie with everything.
    scores : array of shape (n,)
        Observed scores, larger is better; ``-inf`` for a failed config
        (below every scored one).
    """
    F = np.asarray(predictions, dtype=float)
    y = np.asarray(scores, dtype=float)
    better = (y[:, None] > y[None, :]).astype(float)  # (n, n): a beat b
    with np.errstate(invalid="ignore"):
        diff = F.T[:, :, None] - F.T[:, None, :]  # (m, n, n): model's a minus b
    wrong = np.where(np.isnan(diff), 0.5, np.where(diff < 0, 1.0, np.where(diff == 0, 0.5, 0.0)))
    return wrong * better[None, :, :]


def ranking_weights(
    predictions: np.ndarray,
    scores: np.ndarray,
    start: np.ndarray,
    n_boot: int = 256,
    rng: Any = None,
    own: int | None = None,
    dilution_quantile: float = 0.95,
) -> np.ndarray:
    """Weights of models from how well they order the observed scores.

    For each of ``n_boot`` bootstrap resamples of the scored configs (drawn
    with replacement), every model's loss is the number of misranked pairs
    in the resample (:func:`misranked_pairs`); the resample's unit of weight
    goes to the models with the smallest loss. Models tied for the smallest
    loss share it in proportion to their ``start`` weights, so with no
    informative pair the weights stay at ``start`` (the profile similarity).
    A model's weight is its share over the resamples.

    Weight dilution (Feurer, Letham & Bakshy, 2018): when ``own`` names the
    new task's own model, a past-task model whose median loss over the
    resamples exceeds the ``dilution_quantile`` of the own model's losses is
    left out, so many mediocre past tasks cannot outvote the task's own
    evidence.

    Parameters
    ----------
    predictions : array of shape (n, m)
        Each model's prediction at each scored config (larger = better; for
        the own model, out-of-sample predictions).
    scores : array of shape (n,)
        Observed scores, larger is better, ``-inf`` for failures.
    start : array of shape (m,)
        Non-negative starting weights (need not sum to one).
    n_boot : int, default 256
        Bootstrap resamples.
    rng : seed or numpy Generator
    own : int, optional
        Column of the new task's own model (enables weight dilution).
    dilution_quantile : float, default 0.95
        Quantile of the own model's losses above which a past task's median
        loss leaves it out (0.95 as published).

    Returns
    -------
    ndarray of shape (m,)
        Non-negative weights summing to one.
    """
    start = np.asarray(start, dtype=float)
    m = np.asarray(predictions).shape[1]
    if start.shape != (m,) or (start < 0).any() or not np.isfinite(start).all():
        raise ValueError(f"start must hold {m} finite weights >= 0, got {start!r}")
    loss = ranking_losses(predictions, scores, n_boot, rng)
    return weights_from_losses(loss, start, own, dilution_quantile)


def ranking_losses(predictions: np.ndarray, scores: np.ndarray, n_boot: int = 256, rng: Any = None) -> np.ndarray:
    """Misranked pairs of every model in bootstrap resamples of the scored configs.

    Returns an array of shape (n_boot, m); with fewer than two scored configs,
    (1, m) zeros (no pair to judge). See :func:`ranking_weights`.
    """
    F = np.asarray(predictions, dtype=float)
    y = np.asarray(scores, dtype=float)
    n, m = F.shape
    if n < 2:
        return np.zeros((1, m))
    rng = np.random.default_rng(rng)
    wrong = misranked_pairs(F, y)
    counts = rng.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(float)  # (B, n)
    return _resampled(counts, wrong)  # (B, m)


def _resampled(counts: np.ndarray, wrong: np.ndarray) -> np.ndarray:
    """``sum_ab counts[s, a] wrong[k, a, b] counts[s, b]``, shape (B, m), as two matrix products.

    Every term is a whole or half number far below 2**53, so any order of
    summation gives the same floats (the einsum this replaces, 10x slower on
    40 configs and 256 resamples, gave these very numbers).
    """
    m, n, _ = wrong.shape
    left = counts @ wrong.transpose(1, 0, 2).reshape(n, m * n)  # (B, m n): sum_a counts[s, a] wrong[k, a, b]
    return (left.reshape(-1, m, n) * counts[:, None, :]).sum(axis=2)


def luck_losses(predictions: np.ndarray, scores: np.ndarray, n_boot: int = 256, rng: Any = None,
                n_perm: int = 16) -> np.ndarray:
    """Fewest misranked pairs any of the models reaches when the scores are shuffled.

    The level a model must beat to count as ordering the scores better than
    chance when it is the best of ``m`` models: with many models, one of them
    orders a handful of scores well by luck alone, so half the pairs (what a
    single random order misranks on average) is too easy a bar. Each of
    ``n_boot`` bootstrap resamples of the configs (as in
    :func:`ranking_losses`) is scored against one of ``n_perm`` random
    permutations of ``scores`` (a permutation test's null, with the
    maximum taken over the models as in Westfall & Young's step for many
    comparisons), and the smallest loss over the models is kept.

    Parameters
    ----------
    predictions : array of shape (n, m)
    scores : array of shape (n,)
        Observed scores, larger is better, ``-inf`` for failures.
    n_boot : int, default 256
    rng : seed or numpy Generator
    n_perm : int, default 16
        Permutations of the scores the resamples are spread over.

    Returns
    -------
    ndarray of shape (n_boot,)
        ``(1,)`` zeros with fewer than two scored configs.
    """
    F = np.asarray(predictions, dtype=float)
    y = np.asarray(scores, dtype=float)
    n = F.shape[0]
    if n < 2:
        return np.zeros(1)
    rng = np.random.default_rng(rng)
    counts = rng.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(float)  # (B, n)
    out = np.empty(n_boot)
    for group in np.array_split(np.arange(n_boot), max(1, min(n_perm, n_boot))):
        wrong = misranked_pairs(F, rng.permutation(y))
        out[group] = _resampled(counts[group], wrong).min(axis=1)
    return out


def weights_from_losses(loss: np.ndarray, start: np.ndarray, own: int | None = None,
                        dilution_quantile: float = 0.95) -> np.ndarray:
    """Share of resamples each model wins (ties by ``start``), after weight dilution.

    See :func:`ranking_weights`; ``loss`` is :func:`ranking_losses`' output.
    """
    loss = np.array(loss, dtype=float)
    m = loss.shape[1]
    base = start if start.sum() > 0 else np.ones(m)
    base = base / base.sum()
    if own is not None:
        cutoff = np.quantile(loss[:, own], dilution_quantile)
        diluted = np.median(loss, axis=0) > cutoff
        diluted[own] = False
        loss[:, diluted] = np.inf
    best = loss <= loss.min(axis=1, keepdims=True) + 1e-9
    share = best * base[None, :]
    total = share.sum(axis=1, keepdims=True)
    # a resample where every tied model has zero start weight splits evenly among them
    share = np.where(total > 0, share / np.where(total > 0, total, 1.0), best / best.sum(axis=1, keepdims=True))
    w = share.mean(axis=0)
    return w / w.sum()


def chance_share(loss: np.ndarray, sources: np.ndarray, uniform: int) -> float:
    """Share of resamples in which no past task orders the scores better than chance.

    A resample without a pair of different scores counts as no such evidence.

    Parameters
    ----------
    loss : array of shape (B, m)
        :func:`ranking_losses`.
    sources : int array
        Columns of the past tasks.
    uniform : int
        Column of a model that predicts a tie everywhere (uniform sampling):
        its loss is half the pairs, what a random order misranks on average.
    """
    judged = loss[:, uniform] > 0  # a resample without a scored pair says nothing either way
    return float(np.mean(judged & (loss[:, sources].min(axis=1) >= loss[:, uniform])))


def greedy_cover(in_top: np.ndarray, quality: np.ndarray, weights: np.ndarray,
                 covered: np.ndarray, allowed: np.ndarray | None = None,
                 best: np.ndarray | None = None) -> int | None:
    """Index of the candidate that covers the most weight of uncovered top sets.

    With ``best`` (soft coverage, the greedy objective of Wistuba et al.) the
    gain of a candidate is instead ``sum_m w_m max(0, quality[c, m] - best[m])``:
    how much it raises the weighted best quantile reached in every past task.

    Parameters
    ----------
    in_top : bool array of shape (c, m)
        Whether candidate ``c`` lies in the top set of past task ``m``.
    quality : array of shape (c, m)
        Within-study quantile past task ``m`` gives candidate ``c`` (breaks
        ties: among equal coverage, the best weighted mean quantile).
    weights : array of shape (m,)
        Current weights of the past tasks.
    covered : bool array of shape (m,)
        Past tasks whose top set an earlier config already covers.
    allowed : bool array of shape (c,), optional
        Candidates that may be picked (default: all).
    best : array of shape (m,), optional
        Best quantile an earlier config reached in each past task (soft
        coverage; ``in_top`` and ``covered`` are then unused).

    Returns
    -------
    int or None
        ``None`` when no candidate is allowed.
    """
    w = np.asarray(weights, dtype=float)
    if best is not None:
        gain = np.maximum(quality - np.asarray(best, dtype=float)[None, :], 0.0) @ w + 1e-6 * (quality @ w)
    else:
        gain = in_top.astype(float) @ (w * ~covered) + 1e-6 * (quality @ w)
    if allowed is not None:
        if not allowed.any():
            return None
        gain = np.where(allowed, gain, -np.inf)
    return int(np.argmax(gain))
