"""Gain: how much a search beat uniform sampling, and warm beat cold, in bits.

Active information (a published measure of search performance):

- the *target set* T holds the configs whose score is in the top ``gamma``
  of the task's score distribution under uniform sampling of the space;
- ``p`` is the chance that one uniform draw lands in T (``gamma`` by
  construction, or estimated);
- ``q`` is a search's expected per-query chance of success: the mean over
  its B queries, averaged over R independent runs, of landing in T;
- bits over uniform ``= log2(q / p)``; gain of warm over cold
  ``= log2(q_warm / q_cold)``.

A run that never hits leaves ``q = 0`` and the logarithm undefined; hits are
then smoothed (``(hits + 1/2) / (queries + 1)``, the Jeffreys estimate) and
the figure is flagged. Intervals are percentile bootstraps over runs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
from scipy.stats import wilcoxon

from warmstart.errors import WarmstartError
from warmstart.gain.verdicts import paired_runs_p, verdicts

__all__ = [
    "GainError",
    "Runs",
    "TaskGain",
    "PooledGain",
    "target_threshold",
    "in_target",
    "hits_and_regret",
    "hit_rate",
    "bits",
    "bits_interval",
    "compare",
    "pool",
    "GainResult",
    "N_BOOT",
    "MIN_RUNS",
    "interval_text",
    "queries_text",
    "HINDSIGHT_LABELS",
]

#: Figures that peek at the held-out scores (not searches; see :func:`warmstart.gain.replay.hindsight_rates`).
HINDSIGHT_LABELS = ("best_past_task", "ideal_list")

#: Bootstrap resamples for intervals (common practice: 1,000-10,000).
N_BOOT = 2000
#: Fewest runs per search for a per-task interval and verdict: a bootstrap over
#: fewer runs has so few distinct resamples that its interval collapses
#: (common practice: a handful of runs at the least).
MIN_RUNS = 5


class GainError(WarmstartError, ValueError):
    """Gain cannot be computed from the given runs."""


def target_threshold(scores: Sequence[float], gamma: float = 0.05, maximize: bool = True) -> float:
    """Score a config must reach to be in the top ``gamma`` of ``scores``.

    ``scores`` are the task's scores under uniform sampling (failed ones,
    NaN, are ignored). The target set holds ``ceil(gamma * n)`` configs at
    least (ties may add more).
    """
    s = np.asarray(scores, dtype=float)
    s = s[np.isfinite(s)]
    if s.size == 0:
        raise GainError("no finite score to define a target set from")
    if not 0 < gamma < 1:
        raise GainError(f"gamma must lie in (0, 1), got {gamma!r}")
    k = max(1, int(math.ceil(gamma * s.size)))
    ordered = np.sort(s)[::-1] if maximize else np.sort(s)
    return float(ordered[k - 1])


def in_target(scores: np.ndarray, threshold: float, maximize: bool = True) -> np.ndarray:
    """Boolean array: which scores reach the target (NaN never does)."""
    s = np.asarray(scores, dtype=float)
    with np.errstate(invalid="ignore"):
        hit = s >= threshold if maximize else s <= threshold
    return hit & np.isfinite(s)


def hits_and_regret(scores: np.ndarray, threshold: float, reference: np.ndarray,
                    maximize: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Hits and normalised best-so-far regret of searches' scores, query by query.

    Parameters
    ----------
    scores : ndarray (..., B)
        Scores of B queries in order (the last axis), e.g. (runs, budget);
        NaN for a failed query, which never hits and finds nothing.
    threshold : float
        Score a query must reach to hit (:func:`target_threshold`).
    reference : ndarray
        Scores that span the task: the best of them is regret 0, the worst
        regret 1 (NaN ignored).
    maximize : bool, default True

    Returns
    -------
    hits : ndarray (..., B) of bool
        :func:`in_target` of each score.
    regret : ndarray (..., B)
        ``(best - best so far) / (best - worst)`` after each query, clipped
        to [0, 1] (1 until the first successful query); the span is 1 when
        every reference score is equal.
    """
    s = np.asarray(scores, dtype=float)
    sign = 1.0 if maximize else -1.0
    ref = sign * np.asarray(reference, dtype=float)
    best, worst = np.nanmax(ref), np.nanmin(ref)
    span = best - worst if best > worst else 1.0
    signed = np.where(np.isnan(s), -np.inf, sign * s)
    regret = np.clip((best - np.maximum.accumulate(signed, axis=-1)) / span, 0.0, 1.0)
    return in_target(s, threshold, maximize), regret


@dataclass(frozen=True)
class Runs:
    """Hits of R independent runs of one search on one task.

    Attributes
    ----------
    hits : ndarray (R, B) of bool
        Whether query t of run r landed in the target set.
    regret : ndarray (R, B), optional
        Best-so-far regret after each query (0 = the best recorded score).
    label : str
    """

    hits: np.ndarray
    regret: np.ndarray | None = None
    label: str = ""

    def __post_init__(self):
        h = np.asarray(self.hits, dtype=bool)
        if h.ndim != 2 or h.size == 0:
            raise GainError(f"hits must be a non-empty (runs, budget) array, got shape {h.shape}")
        object.__setattr__(self, "hits", h)

    @property
    def n_runs(self) -> int:
        return self.hits.shape[0]

    @property
    def budget(self) -> int:
        return self.hits.shape[1]

    def truncate(self, budget: int) -> "Runs":
        """The same runs seen after only ``budget`` queries."""
        reg = None if self.regret is None else self.regret[:, :budget]
        return Runs(self.hits[:, :budget], reg, self.label)

    def first_hit(self) -> np.ndarray:
        """Per run: number of queries up to the first hit (``inf`` if none)."""
        any_hit = self.hits.any(axis=1)
        first = np.argmax(self.hits, axis=1).astype(float) + 1.0
        return np.where(any_hit, first, np.inf)


def hit_rate(hits: np.ndarray) -> tuple[float, bool]:
    """Per-query success rate q of a (R, B) hit matrix, smoothed if zero.

    Returns
    -------
    (q, smoothed)
        ``smoothed`` is True when no query hit and the Jeffreys estimate
        ``(0 + 1/2) / (R B + 1)`` was used.
    """
    h = np.asarray(hits, dtype=bool)
    n = h.size
    k = int(h.sum())
    if k == 0:
        return 0.5 / (n + 1), True
    return k / n, False


def bits(q: float, p: float) -> float:
    """Active information ``log2(q / p)`` in bits."""
    if not (q > 0 and p > 0):
        raise GainError(f"bits need positive q and p, got q={q!r}, p={p!r}; smooth zero hit rates first")
    return math.log2(q / p)


def _boot_rates(hits: np.ndarray, rng: np.random.Generator, n_boot: int) -> np.ndarray:
    """Bootstrap distribution of the smoothed hit rate, resampling runs."""
    per_run = hits.sum(axis=1)
    R, B = hits.shape
    idx = rng.integers(0, R, size=(n_boot, R))
    k = per_run[idx].sum(axis=1).astype(float)
    n = R * B
    return np.where(k > 0, k / n, 0.5 / (n + 1))


def bits_interval(runs: Runs, p: float, rng: Any = 0, n_boot: int = N_BOOT) -> tuple[float, float, float]:
    """Bits over uniform of one search, with a bootstrap 95 % interval over runs.

    Returns
    -------
    (bits, low, high)
    """
    if not 0 < p <= 1:
        raise GainError(f"p must lie in (0, 1], got {p!r}")
    q, _ = hit_rate(runs.hits)
    boot = np.log2(_boot_rates(runs.hits, np.random.default_rng(rng), n_boot) / p)
    lo, hi = np.percentile(boot, [2.5, 97.5])
    return math.log2(q / p), float(lo), float(hi)


class _FlatFigures:
    """``to_dict()`` for result dataclasses: their fields, with ``extra`` merged in."""

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "extra"}
        d.update(self.extra)
        return d


@dataclass(frozen=True)
class TaskGain(_FlatFigures):
    """Warm vs cold on one task.

    Attributes
    ----------
    task : str
    p : float
        Chance of a uniform draw landing in the target set.
    q_warm, q_cold : float
        Per-query success rates (smoothed where flagged).
    bits_warm, bits_cold : float
        ``log2(q / p)``.
    gain : float
        ``log2(q_warm / q_cold)``.
    gain_low, gain_high : float
        Bootstrap 95 % interval of the gain, resampling runs.
    smoothed : bool
        A zero hit count was smoothed.
    first_hit_warm, first_hit_cold : float
        Median queries to the first hit (``inf`` when most runs never hit).
    verdict : str
        ``helped`` (interval above 0), ``hurt`` (below 0), ``no evidence``,
        or ``too few runs`` (fewer than :data:`MIN_RUNS` per search; the
        interval is then NaN).
    """

    task: str
    p: float
    q_warm: float
    q_cold: float
    bits_warm: float
    bits_cold: float
    gain: float
    gain_low: float
    gain_high: float
    smoothed: bool
    first_hit_warm: float
    first_hit_cold: float
    verdict: str
    extra: dict = field(default_factory=dict)



def compare(
    task: str,
    warm: Runs,
    cold: Runs,
    p: float,
    rng: Any = 0,
    n_boot: int = N_BOOT,
    others: Mapping[str, Runs] | None = None,
) -> TaskGain:
    """Gain of ``warm`` over ``cold`` on one task, with a bootstrap interval.

    Parameters
    ----------
    task : str
    warm, cold : Runs
        Runs of the two searches with the same budget.
    p : float
        Uniform chance of a hit, in (0, 1].
    rng : seed or Generator
        For the bootstrap.
    n_boot : int
    others : mapping of label -> Runs, optional
        Further searches (baselines); their bits over uniform are added to
        :attr:`TaskGain.extra` as ``bits_<label>``.
    """
    if not 0 < p <= 1:
        raise GainError(f"p must lie in (0, 1], got {p!r}")
    if warm.budget != cold.budget:
        raise GainError(f"warm and cold runs need the same budget, got {warm.budget} and {cold.budget}")
    rng = np.random.default_rng(rng)
    qw, sw = hit_rate(warm.hits)
    qc, sc = hit_rate(cold.hits)
    bw = _boot_rates(warm.hits, rng, n_boot)
    bc = _boot_rates(cold.hits, rng, n_boot)
    g = np.log2(bw / bc)
    lo, hi = (float(v) for v in np.percentile(g, [2.5, 97.5]))
    gain = math.log2(qw / qc)
    verdict = "helped" if lo > 0 else "hurt" if hi < 0 else "no evidence"
    if min(warm.n_runs, cold.n_runs) < MIN_RUNS:
        lo = hi = float("nan")
        verdict = "too few runs"
    extra: dict = {"p_paired": paired_runs_p(warm.hits, cold.hits), "raw_q_warm": float(warm.hits.mean())}
    smoothed = sw or sc
    for label, runs in (others or {}).items():
        h = runs.truncate(warm.budget).hits
        q, s = hit_rate(h)
        extra[f"bits_{label}"] = math.log2(q / p)  # per task: smoothed, so a list that never hit has a figure
        # unsmoothed, for pooling: a list run once smooths a miss to 0.5 / (B + 1), about p itself, which
        # would lift a pooled list that hits at the uniform rate by some 0.6 bit (B = 10, p = 0.05)
        extra[f"q_{label}"] = float(h.mean())
        smoothed = smoothed or s
    if warm.regret is not None and cold.regret is not None:
        extra["regret_warm"] = float(np.mean(warm.regret[:, -1]))
        extra["regret_cold"] = float(np.mean(cold.regret[:, -1]))
    return TaskGain(
        task=task, p=p, q_warm=qw, q_cold=qc, bits_warm=math.log2(qw / p), bits_cold=math.log2(qc / p),
        gain=gain, gain_low=lo, gain_high=hi, smoothed=smoothed,
        first_hit_warm=float(np.median(warm.first_hit())), first_hit_cold=float(np.median(cold.first_hit())),
        verdict=verdict, extra=extra,
    )


@dataclass(frozen=True)
class PooledGain(_FlatFigures):
    """Warm vs cold across tasks.

    Attributes
    ----------
    n_tasks : int
    bits_warm, bits_cold : float
        Pooled ``log2(mean q / mean p)`` over tasks.
    gain : float
        Pooled ``log2(mean q_warm / mean q_cold)``.
    gain_low, gain_high : float
        95 % interval from a bootstrap over tasks.
    wilcoxon_p : float
        Two-sided p-value of the Wilcoxon signed-rank test on per-task
        ``bits_warm - bits_cold`` (NaN with fewer than two non-zero differences).
    share_hurt : float
        Share of tasks whose point gain is below zero.
    share_hurt_clearly : float
        Share of tasks whose verdict is ``hurt``: after
        :func:`~warmstart.gain.verdicts.judge`, a loss significant in the
        paired test over runs with Holm's correction across tasks (before it,
        the bootstrap interval of :func:`compare` lies below zero).
    share_hurt_outside_noise : float
        ``share_hurt`` among the tasks not flagged ``within_noise`` (their
        target set stands out of cross-validation noise); NaN when no task
        carries the flag or every task does.
    wins, ties, losses : int
        Tasks whose point gain is above, within or below the region of
        practical equivalence (+-0.1 bit, :data:`~warmstart.gain.verdicts.ROPE_BITS`).
    share_loss, share_loss_low, share_loss_high : float
        ``losses / n_tasks`` with its Wilson 95 % interval.
    significant_losses : int
        Tasks with gain below 0 whose paired test (Wilcoxon over runs) stays
        significant after Holm's correction across tasks (alpha 0.05).
    extra : dict
        Pooled bits of further searches (``bits_<label>``) and the share of
        tasks on which warm's hit rate was above each one's
        (``share_warm_above_<label>``).
    """

    n_tasks: int
    bits_warm: float
    bits_cold: float
    gain: float
    gain_low: float
    gain_high: float
    wilcoxon_p: float
    share_hurt: float
    share_hurt_clearly: float
    share_hurt_outside_noise: float = float("nan")
    wins: int = 0
    ties: int = 0
    losses: int = 0
    share_loss: float = float("nan")
    share_loss_low: float = float("nan")
    share_loss_high: float = float("nan")
    significant_losses: int = 0
    extra: dict = field(default_factory=dict)



def interval_text(low: float, high: float) -> str:
    """``95% +a to +b``, or why there is no interval (NaN bounds)."""
    if not (math.isfinite(low) and math.isfinite(high)):
        return f"no interval: fewer than {MIN_RUNS} runs per search"
    return f"95% {low:+.2f} to {high:+.2f}"


def queries_text(value: float) -> str:
    """A median count of queries, or ``never`` when most runs never hit."""
    return f"{value:g}" if math.isfinite(value) else "never"


def pool(results: Sequence[TaskGain], rng: Any = 0, n_boot: int = N_BOOT) -> PooledGain:
    """Pool per-task gains: expected per-query success over the tasks."""
    if not results:
        raise GainError("no task results to pool")
    rng = np.random.default_rng(rng)
    p = np.array([r.p for r in results])
    qw = np.array([r.q_warm for r in results])
    qc = np.array([r.q_cold for r in results])
    n = len(results)
    idx = rng.integers(0, n, size=(n_boot, n))
    g = np.log2(qw[idx].mean(axis=1) / qc[idx].mean(axis=1))
    lo, hi = (float(v) for v in np.percentile(g, [2.5, 97.5]))
    diff = np.array([r.bits_warm - r.bits_cold for r in results])
    if np.count_nonzero(diff) >= 2:
        wp = float(wilcoxon(diff).pvalue)
    else:
        wp = float("nan")
    extra = {}
    labels = sorted({k[2:] for r in results for k in r.extra if k.startswith("q_")})
    for label in labels:  # pooled from unsmoothed rates (see compare); smoothed only if no task hit
        q = np.array([r.extra.get(f"q_{label}", np.nan) for r in results])
        ok = np.isfinite(q)
        mean_q = np.mean(q[ok]) if ok.any() else np.nan
        if not mean_q > 0:
            smoothed_q = [r.p * 2.0 ** r.extra[f"bits_{label}"] for r in results if f"bits_{label}" in r.extra]
            mean_q = np.mean(smoothed_q) if smoothed_q else np.nan
        extra[f"bits_{label}"] = float(np.log2(mean_q / p[ok].mean())) if ok.any() else float("nan")
    raw_w = np.array([r.extra.get("raw_q_warm", r.q_warm) for r in results])
    for label in labels:  # how often warm did better than each other search, task by task
        if label in HINDSIGHT_LABELS:
            continue
        q = np.array([r.extra.get(f"q_{label}", np.nan) for r in results])
        if np.isfinite(q).any():
            extra[f"share_warm_above_{label}"] = float(np.mean((raw_w > q)[np.isfinite(q)]))
    clear = [r for r in results if r.extra.get("within_noise") is False]
    hurt_clear = float(np.mean([r.gain < 0 for r in clear])) if clear else float("nan")
    v = verdicts([r.task for r in results], [r.gain for r in results],
                 [r.extra.get("p_paired", math.nan) for r in results])
    return PooledGain(
        n_tasks=n,
        bits_warm=float(np.log2(qw.mean() / p.mean())),
        bits_cold=float(np.log2(qc.mean() / p.mean())),
        gain=float(np.log2(qw.mean() / qc.mean())),
        gain_low=lo, gain_high=hi, wilcoxon_p=wp,
        share_hurt=float(np.mean([r.gain < 0 for r in results])),
        share_hurt_clearly=float(np.mean([r.verdict == "hurt" for r in results])),
        share_hurt_outside_noise=hurt_clear,
        wins=v.wins, ties=v.ties, losses=v.losses, share_loss=v.share_loss,
        share_loss_low=v.share_loss_low, share_loss_high=v.share_loss_high,
        significant_losses=v.significant_losses,
        extra=extra,
    )


@dataclass
class GainResult:
    """Warm vs cold for one learner and budget: per-task gains, the pooled
    figure and mean curves (label -> (hit rate per query, regret per query))."""

    learner: str
    budget: int
    repeats: int
    gamma: float
    tasks: list[TaskGain]
    pooled: PooledGain
    curves: dict = field(default_factory=dict)

    def to_frame(self) -> pd.DataFrame:
        """Per-task figures, one row per task."""
        frame = pd.DataFrame([t.to_dict() for t in self.tasks])
        frame.insert(0, "learner", self.learner)
        return frame
