"""Verdicts on warm against cold by standard practice (issue 18, point 4).

Per task, a paired test over its runs (Wilcoxon signed-rank on the per-run
hit counts, runs paired by seed) gives a p-value; across tasks the p-values
are Holm-corrected (Holm, 1979), and a task counts as *hurt* only when its
gain is below 0 and its corrected p-value is below ``alpha``. Beside that,
every task is a win, tie or loss with a region of practical equivalence of
``rope`` bits on its point gain (Benavoli, Corani, Demsar & Zaffalon, JMLR
2017), and the share of losses gets a Wilson 95 % interval (Wilson, 1927).
Across tasks the paired Wilcoxon test on per-task bits is the one
:func:`warmstart.gain.bits.pool` reports (Demsar, JMLR 2006).
"""

from __future__ import annotations

import math
import dataclasses
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from scipy.special import ndtri
from scipy.stats import wilcoxon

__all__ = ["ROPE_BITS", "ALPHA", "holm", "wilson_interval", "paired_runs_p", "Verdicts", "verdicts", "judge"]

#: Region of practical equivalence of a per-task gain, in bits (issue 18).
ROPE_BITS = 0.1
#: Family-wise error rate of the Holm-corrected per-task tests (common practice).
ALPHA = 0.05


def holm(pvalues: Sequence[float]) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm, 1979), in the input order.

    The ``i``-th smallest of ``m`` p-values is multiplied by ``m - i`` (``i``
    from 0), a running maximum keeps the adjusted values in order, and they
    are capped at 1. NaN p-values stay NaN and do not count in ``m``.
    """
    p = np.asarray(pvalues, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(~np.isnan(p))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    adjusted = np.maximum.accumulate(p[order] * (m - np.arange(m)))
    out[order] = np.minimum(adjusted, 1.0)
    return out


def wilson_interval(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a proportion ``k / n`` (Wilson, 1927).

    Same as ``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")``.
    ``(nan, nan)`` when ``n == 0``.
    """
    if n <= 0:
        return math.nan, math.nan
    if not 0 <= k <= n:
        raise ValueError(f"k must lie in 0..n={n}, got {k}")
    z = float(ndtri(0.5 + confidence / 2))
    phat = k / n
    centre = (phat + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(phat * (1 - phat) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def paired_runs_p(warm_hits: np.ndarray, cold_hits: np.ndarray) -> float:
    """Two-sided p-value of the Wilcoxon signed-rank test on per-run hit counts.

    Runs are paired by position (the replay gives run ``r`` of both searches
    seed ``seed + r``); zero differences are dropped (Wilcoxon's rule). 1.0
    when every difference is zero; NaN with fewer runs than two.
    """
    w = np.asarray(warm_hits, dtype=bool).sum(axis=1)
    c = np.asarray(cold_hits, dtype=bool).sum(axis=1)
    n = min(w.size, c.size)
    if n < 2:
        return math.nan
    d = (w[:n] - c[:n]).astype(float)
    if not d.any():
        return 1.0
    return float(wilcoxon(d).pvalue)


@dataclass(frozen=True)
class Verdicts:
    """Win/tie/loss and significant losses across tasks.

    Attributes
    ----------
    n_tasks : int
    wins, ties, losses : int
        Tasks whose point gain is above ``+rope``, within it, below ``-rope``.
    share_loss : float
        ``losses / n_tasks``.
    share_loss_low, share_loss_high : float
        Wilson 95 % interval of ``share_loss``.
    significant_losses : int
        Tasks with gain below 0 and Holm-corrected p-value below ``alpha``.
    share_significant_loss : float
    rope, alpha : float
    per_task : list of dict
        ``task, gain, p_value, p_holm, outcome`` (``win``/``tie``/``loss``),
        ``hurt`` (a significant loss).
    """

    n_tasks: int
    wins: int
    ties: int
    losses: int
    share_loss: float
    share_loss_low: float
    share_loss_high: float
    significant_losses: int
    share_significant_loss: float
    rope: float = ROPE_BITS
    alpha: float = ALPHA
    per_task: list = field(default_factory=list, repr=False)

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    def summary(self) -> str:
        """One line: wins/ties/losses, the loss share with its interval, significant losses."""
        return (f"win/tie/loss {self.wins}/{self.ties}/{self.losses} (equivalence region +-{self.rope:g} bit); "
                f"losses {self.share_loss:.0%} (95% {self.share_loss_low:.0%} to {self.share_loss_high:.0%}); "
                f"significant losses (Holm, alpha {self.alpha:g}): {self.significant_losses} of {self.n_tasks}")


def verdicts(tasks: Sequence[str], gains: Sequence[float], p_values: Sequence[float],
             rope: float = ROPE_BITS, alpha: float = ALPHA) -> Verdicts:
    """Verdicts of warm against cold over tasks.

    Parameters
    ----------
    tasks : sequence of str
    gains : sequence of float
        Point gain of warm over cold per task, in bits.
    p_values : sequence of float
        Per-task p-values of the paired test (:func:`paired_runs_p`).
    rope : float, default 0.1
        Half-width of the region of practical equivalence, in bits.
    alpha : float, default 0.05
        Family-wise error rate of the Holm correction.
    """
    g = np.asarray(gains, dtype=float)
    p = np.asarray(p_values, dtype=float)
    if not (len(tasks) == g.size == p.size):
        raise ValueError(f"tasks, gains and p_values need one entry per task; got {len(tasks)}, {g.size}, {p.size}")
    if not rope >= 0:
        raise ValueError(f"rope must be a number of bits >= 0, got {rope!r}")
    adjusted = holm(p)
    outcome = np.where(g > rope, "win", np.where(g < -rope, "loss", "tie"))
    hurt = (g < 0) & (adjusted < alpha)
    n = g.size
    losses = int((outcome == "loss").sum())
    low, high = wilson_interval(losses, n)
    per_task = [{"task": t, "gain": float(gi), "p_value": float(pi), "p_holm": float(ai), "outcome": str(o),
                 "hurt": bool(h)} for t, gi, pi, ai, o, h in zip(tasks, g, p, adjusted, outcome, hurt)]
    return Verdicts(
        n_tasks=n, wins=int((outcome == "win").sum()), ties=int((outcome == "tie").sum()), losses=losses,
        share_loss=losses / n if n else math.nan, share_loss_low=low, share_loss_high=high,
        significant_losses=int(hurt.sum()), share_significant_loss=float(hurt.mean()) if n else math.nan,
        rope=float(rope), alpha=float(alpha), per_task=per_task,
    )


def judge(results: Sequence, rope: float = ROPE_BITS, alpha: float = ALPHA) -> list:
    """Per-task verdicts by the Holm-corrected paired test, across all given tasks.

    Each :class:`~warmstart.gain.bits.TaskGain` (its ``extra["p_paired"]`` set
    by :func:`~warmstart.gain.bits.compare`) gets ``verdict`` ``helped`` or
    ``hurt`` when its corrected p-value is below ``alpha`` (by the sign of its
    gain), ``no evidence`` otherwise, and keeps ``too few runs``; ``extra``
    gains ``p_holm`` and ``outcome`` (win/tie/loss against the region of
    practical equivalence). Returns new objects in the same order.
    """
    if not results:
        return []
    v = verdicts([r.task for r in results], [r.gain for r in results],
                 [r.extra.get("p_paired", math.nan) for r in results], rope, alpha)
    out = []
    for r, row in zip(results, v.per_task):
        verdict = r.verdict
        if verdict != "too few runs":
            significant = row["p_holm"] < alpha
            verdict = ("hurt" if r.gain < 0 else "helped") if significant and r.gain != 0 else "no evidence"
        out.append(dataclasses.replace(r, verdict=verdict,
                                       extra={**r.extra, "p_holm": row["p_holm"], "outcome": row["outcome"]}))
    return out
