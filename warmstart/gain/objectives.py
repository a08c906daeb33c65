"""A held-out study's recorded trials acting as its objective, in two ways.

The replay (:mod:`warmstart.gain.replay`) measures transfer without training
a model: the held-out study's recorded trials score the searches'
proposals. Both objectives here follow one protocol,
:class:`HeldOutObjective`; a search run evaluates ``objective.new_run(budget)``,
a fresh evaluator for each run.

:class:`ReplayObjective` (``nearest``)
    each query of a run evaluates the nearest recorded config (unit cube)
    that this run has not evaluated yet (:class:`NearestReplayRun`), the
    usual convention for replaying a table of recorded evaluations: a run
    never evaluates one recorded config twice, so a search that narrows in
    on a hit is scored on the hit's unevaluated neighbours, not on the hit
    again. Its target set is a handful of recorded configs (top 5 % of 96
    is 5), and ``p`` is their share among the recorded configs.
:class:`SurrogateObjective` (``surrogate``)
    a Gaussian process (:mod:`warmstart.search.gp`) fitted to the recorded
    trials scores every point of the space by its posterior mean. The
    target set is then a region (the top ``gamma`` of the surrogate under
    uniform sampling), as it is for a live objective; it has no per-run
    state (``new_run`` returns the objective itself).

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

from warmstart.gain.bits import GainError, in_target
from warmstart.search.gp import SURROGATE_KERNEL, fit_gp, gp_features
from warmstart.space import Space, unit_distances

__all__ = ["HeldOutObjective", "ReplayObjective", "NearestReplayRun", "SurrogateObjective"]


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
    max_budget : int or None
        Most queries one run may make (``None``: no limit).

    Methods
    -------
    values(rows) -> ndarray
        Scores of encoded rows (n, d), in the recorded score units, each
        scored on its own (no run state: for reference figures).
    new_run(budget) -> callable
        A fresh evaluator for one run of a search: ``evaluator(config) ->
        float`` is the objective :func:`~warmstart.search.strategy.run_search`
        evaluates, and ``evaluator.values(rows)`` scores a list of encoded
        rows queried in order by that run. Runs never share state.
    uniform_hit_chance(threshold, n, rng) -> float
        ``p``: the per-query chance of a hit of uniform sampling (never 0).
    max_distinct_hits(threshold, budget) -> int
        Most hits ``budget`` queries of one run can score (for the
        hindsight figure ``ideal_list``).
    """

    space: Space
    maximize: bool
    reference_scores: np.ndarray
    max_budget: int | None

    def values(self, rows: np.ndarray) -> np.ndarray: ...

    def new_run(self, budget: int | None = None) -> Any: ...

    def uniform_hit_chance(self, threshold: float, n: int = 4096, rng: Any = 0) -> float: ...

    def max_distinct_hits(self, threshold: float, budget: int) -> int: ...


def _uniform_hit_chance(objective: HeldOutObjective, threshold: float, n: int, rng: Any) -> float:
    """Share of ``n`` uniform draws whose score reaches ``threshold``, at least ``0.5 / (n + 1)``."""
    rows = objective.space.sample_unit(n, np.random.default_rng(rng))
    hit = in_target(objective.values(rows), threshold, objective.maximize)
    return float(max(hit.mean(), 0.5 / (n + 1)))


class ReplayObjective:
    """A held-out study's recorded trials acting as its objective: the nearest one scores.

    Follows :class:`HeldOutObjective`. It is not callable itself: a search
    run evaluates :meth:`new_run`, which never evaluates one recorded config
    twice (see :class:`NearestReplayRun`).

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

    @property
    def max_budget(self) -> int:
        """Most queries of one run: the number of recorded configs."""
        return int(self.scores.size)

    def nearest(self, rows: np.ndarray) -> np.ndarray:
        """Index of the nearest recorded config for each encoded row (no run state)."""
        return np.argmin(unit_distances(self.space, np.atleast_2d(rows), self.X), axis=1)

    def values(self, rows: np.ndarray) -> np.ndarray:
        """Scores of the rows' nearest recorded configs, each row on its own (no run state)."""
        return self.scores[self.nearest(rows)]

    def new_run(self, budget: int | None = None) -> "NearestReplayRun":
        """A fresh evaluator for one run of a search.

        Parameters
        ----------
        budget : int, optional
            Queries the run will make; refused when above the number of
            recorded configs (each is evaluated at most once per run).

        Raises
        ------
        GainError
            ``budget`` exceeds the number of recorded configs.
        """
        if budget is not None and budget > self.max_budget:
            raise GainError(
                f"the nearest replay evaluates each recorded config at most once per run: budget {budget} exceeds "
                f"the {self.max_budget} recorded configs of this study; lower the budget to at most "
                f"{self.max_budget} or use the surrogate replay")
        return NearestReplayRun(self)

    def max_distinct_hits(self, threshold: float, budget: int) -> int:
        """Most hits ``budget`` queries of one run can score: ``min(|T|, B)``."""
        return min(int(in_target(self.scores, threshold, self.maximize).sum()), budget)

    def target_share(self, threshold: float) -> float:
        """Share of the recorded configs that reach ``threshold``: ``|T| / m``."""
        return float(in_target(self.scores, threshold, self.maximize).mean())

    def uniform_hit_chance(self, threshold: float, n: int = 4096, rng: Any = 0) -> float:
        """``p``: the target share of the recorded configs, ``|T| / m`` (``n`` and ``rng`` unused).

        This is the per-query hit chance of uniform sampling over what a run
        of this replay can evaluate, the ``m`` recorded configs, each at
        most once: every query of such a run hits with chance exactly
        ``|T| / m``. (The share of the unit cube whose nearest recorded
        config is a target, the Voronoi-volume chance, is the first query's
        chance for uniform draws in the cube and is ``|T| / m`` on average
        over target sets drawn at random, but not on each one; the control
        of :mod:`warmstart.gain.control` needs a ``p`` that does not move
        with the permutation.) Never below ``0.5 / (m + 1)``.
        """
        return float(max(self.target_share(threshold), 0.5 / (self.scores.size + 1)))


class NearestReplayRun:
    """One run of a search on a nearest replay: each recorded config is evaluated at most once.

    Each query evaluates the nearest recorded config (unit-cube distance of
    :func:`~warmstart.space.unit_distances`, the first of equals) that this
    run has not evaluated yet, and returns its recorded score; the search
    records its own proposal with that score. Made by
    :meth:`ReplayObjective.new_run`, one per run: its state (which recorded
    configs were evaluated) belongs to the run and travels with it to a
    worker process, so runs never share it and a run's figures do not
    depend on where it ran.

    Why the permuted control then holds exactly, whatever the search does:
    permuting the recorded scores uniformly at random makes the target set
    ``T`` (the recorded configs whose score reaches the threshold) a
    uniformly random set of its size among the ``m`` recorded configs.
    Given everything a run has seen (the scores of the ``k`` configs it
    evaluated), the remaining ``|T| - h`` targets are a uniformly random set
    among the ``m - k`` unevaluated configs, so the next query, whichever
    unevaluated config it maps to, hits with chance ``(|T| - h) / (m - k)``.
    The expected hit count after ``k`` queries is then ``k |T| / m`` by
    induction (if ``E[h_k] = k |T| / m``, then ``E[h_{k+1}] = E[h_k] +
    (|T| - E[h_k]) / (m - k) = (k + 1) |T| / m``), so the per-query hit rate
    ``q`` has expectation ``p = |T| / m`` for every search, adaptive or
    not; bits over uniform are at most 0 in expectation and, by Markov's
    inequality on ``q / p``, at least ``b`` bits on at most a share
    ``2**-b`` of permutations. Under the former rule (the nearest recorded
    config, evaluated again and again) a search returning near a hit scored
    the same hit again, and adaptive searches gained +0.6 to +0.7 bits on
    permuted svm tasks.

    Parameters
    ----------
    objective : ReplayObjective

    Attributes
    ----------
    evaluated : ndarray of int
        Indices of the recorded configs this run evaluated, in query order.
    """

    def __init__(self, objective: ReplayObjective):
        self.objective = objective
        self.maximize = objective.maximize
        self._done = np.zeros(objective.scores.size, dtype=bool)
        self._order: list[int] = []

    @property
    def evaluated(self) -> np.ndarray:
        return np.array(self._order, dtype=int)

    def _take(self, distances: np.ndarray) -> int:
        """Mark and return the nearest unevaluated recorded config of one row's distances."""
        if self._done.all():
            raise GainError(f"this run has evaluated all {self._done.size} recorded configs; a run of the nearest "
                            "replay makes at most that many queries")
        i = int(np.argmin(np.where(self._done, np.inf, distances)))
        self._done[i] = True
        self._order.append(i)
        return i

    def values(self, rows: np.ndarray) -> np.ndarray:
        """Scores of encoded rows queried in this order by this run (each query marks its config evaluated)."""
        obj = self.objective
        D = unit_distances(obj.space, np.atleast_2d(rows), obj.X)
        return obj.scores[[self._take(d) for d in D]]

    def __call__(self, config: dict) -> float:
        return float(self.values(self.objective.space.encode([config]))[0])


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

    #: a surrogate scores every point of the space: no limit on a run's queries
    max_budget = None

    def new_run(self, budget: int | None = None) -> "SurrogateObjective":
        """The evaluator of one run: the surrogate itself (it has no run state)."""
        return self

    def uniform_hit_chance(self, threshold: float, n: int = 4096, rng: Any = 1) -> float:
        """``p``: chance that a uniform draw reaches ``threshold`` (fresh draws)."""
        return _uniform_hit_chance(self, threshold, n, rng)

    def max_distinct_hits(self, threshold: float, budget: int) -> int:
        """Most hits ``budget`` distinct proposals can score: all of them."""
        return budget
