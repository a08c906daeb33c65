"""A held-out study's recorded trials acting as its objective, in two ways.

The replay (:mod:`warmstart.gain.replay`) measures transfer without training
a model: the held-out study's recorded trials score the searches'
proposals. Both objectives here follow one protocol,
:class:`HeldOutObjective`:

:class:`ReplayObjective` (``nearest``)
    a proposed config scores what its nearest recorded config scored (unit
    cube). Its target set is a handful of recorded configs (top 5 % of 96
    is 5), so no list of ``B`` distinct proposals can hit more than
    ``|T| / B`` of the time, and a search that narrows in on a good region
    is scored as if it kept proposing the same point.
:class:`SurrogateObjective` (``surrogate``)
    a Gaussian process (:mod:`warmstart.search.gp`) fitted to the recorded
    trials scores every point of the space by its posterior mean. The
    target set is then a region (the top ``gamma`` of the surrogate under
    uniform sampling), as it is for a live objective.

The surrogate is fitted to normal scores of the ranks (a Gaussian copula
transform), not to raw scores: R² of a bad config can be -10 when good ones
reach 0.9, and such outliers would flatten the fit where it matters. The
posterior mean is mapped back to score units through the recorded scores'
empirical quantile function, so the surrogate never predicts beyond the
recorded range and ranks exactly as the fitted normal scores rank.
"""

from __future__ import annotations

from typing import Any, Protocol, runtime_checkable

import numpy as np
from scipy.stats import norm, rankdata

from warmstart.gain.bits import in_target
from warmstart.search.gp import SURROGATE_KERNEL, fit_gp, gp_features
from warmstart.space import Space, unit_distances

__all__ = ["HeldOutObjective", "ReplayObjective", "SurrogateObjective"]


@runtime_checkable
class HeldOutObjective(Protocol):
    """What the replay needs from a held-out study's objective.

    Attributes
    ----------
    space : Space
        The study's space.
    maximize : bool
        Whether larger scores are better.
    reference_scores : ndarray
        The task's scores under uniform sampling of the space; their top
        ``gamma`` defines the target set (:func:`~warmstart.gain.bits.target_threshold`)
        and their best and worst span the regret.

    Methods
    -------
    values(rows) -> ndarray
        Scores of encoded rows (n, d), in the recorded score units.
    __call__(config) -> float
        The score of one config: ``values`` of its encoded row. This is the
        objective :func:`~warmstart.search.strategy.run_search` evaluates.
    uniform_hit_chance(threshold, n, rng) -> float
        ``p``: the chance that a uniform draw reaches ``threshold``
        (estimated from ``n`` draws, never 0).
    max_distinct_hits(threshold, budget) -> int
        Most hits ``budget`` distinct proposals can score (for the
        hindsight figure ``ideal_list``).
    """

    space: Space
    maximize: bool
    reference_scores: np.ndarray

    def values(self, rows: np.ndarray) -> np.ndarray: ...

    def __call__(self, config: dict) -> float: ...

    def uniform_hit_chance(self, threshold: float, n: int = 4096, rng: Any = 0) -> float: ...

    def max_distinct_hits(self, threshold: float, budget: int) -> int: ...


def _uniform_hit_chance(objective: HeldOutObjective, threshold: float, n: int, rng: Any) -> float:
    """Share of ``n`` uniform draws whose score reaches ``threshold``, at least ``0.5 / (n + 1)``."""
    rows = objective.space.sample_unit(n, np.random.default_rng(rng))
    hit = in_target(objective.values(rows), threshold, objective.maximize)
    return float(max(hit.mean(), 0.5 / (n + 1)))


class ReplayObjective:
    """A held-out study's recorded trials acting as its objective: the nearest one scores.

    Follows :class:`HeldOutObjective`.

    Parameters
    ----------
    space : Space
    X : ndarray (m, d)
        Encoded recorded configs (successful trials).
    scores : ndarray (m,)
    maximize : bool, default True
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
        return _uniform_hit_chance(self, threshold, n, rng)


class SurrogateObjective:
    """A Gaussian-process surrogate of one study's recorded trials.

    Follows :class:`HeldOutObjective`.

    Parameters
    ----------
    space : Space
    X : ndarray (m, d)
        Encoded recorded configs (successful trials).
    scores : ndarray (m,)
    maximize : bool, default True
    seed : int, default 0
        Seeds the optimiser restarts and the uniform reference sample.
    n_reference : int, default 4096
        Uniform draws whose surrogate values stand for the task's scores
        under uniform sampling (they define the target set).

    Attributes
    ----------
    reference_scores : ndarray (n_reference,)
        Surrogate values of the uniform reference draws.
    recorded_scores : ndarray (m,)
        The recorded scores the surrogate was fitted to.
    """

    def __init__(self, space: Space, X: np.ndarray, scores: np.ndarray, maximize: bool = True,
                 seed: int = 0, n_reference: int = 4096):
        self.space = space
        self.maximize = maximize
        X = np.asarray(X, dtype=float)
        scores = np.asarray(scores, dtype=float)
        keep = np.isfinite(scores)
        X, scores = X[keep], scores[keep]
        if scores.size < 3:
            raise ValueError(f"a surrogate needs at least 3 finite recorded scores, got {scores.size}")
        self.X = X
        self.recorded_scores = scores
        self._conditional = np.isnan(X).any(axis=0)
        # Gaussian copula: normal scores of the ranks (ties share their mean rank)
        z = norm.ppf((rankdata(scores) - 0.5) / scores.size)
        order = np.argsort(z, kind="stable")
        self._z_sorted = z[order]
        self._s_sorted = scores[order]
        self._gp = fit_gp(gp_features(space, X, self._conditional), z, SURROGATE_KERNEL, n_restarts=2,
                          random_state=seed)
        self.reference_scores = self.values(space.sample_unit(n_reference, np.random.default_rng(seed)))

    def values(self, rows: np.ndarray) -> np.ndarray:
        """Surrogate scores of encoded rows, in the recorded score units."""
        z = self._gp.predict(gp_features(self.space, rows, self._conditional))
        return np.interp(z, self._z_sorted, self._s_sorted)

    def __call__(self, config: dict) -> float:
        return float(self.values(self.space.encode([config]))[0])

    def uniform_hit_chance(self, threshold: float, n: int = 4096, rng: Any = 1) -> float:
        """``p``: chance that a uniform draw reaches ``threshold`` (fresh draws)."""
        return _uniform_hit_chance(self, threshold, n, rng)

    def max_distinct_hits(self, threshold: float, budget: int) -> int:
        """Most hits ``budget`` distinct proposals can score: all of them."""
        return budget
