"""A warm search that learns, during the search, which past tasks to trust.

:class:`MixtureSearch` (DESIGN.md section 6, "Next step") replaces a ranked
seed list with a weighted mixture of Parzen estimators:

* every past study (a :class:`~warmstart.prior.Source`) gets its own *good*
  density ``l_i`` (kernel density of its top ``source_gamma`` configs) and
  *rest* density ``g_i`` (the others), built once;
* the new task gets its own ``l_0`` and ``g_0`` from its scored configs
  (pending configs join ``g_0`` as fantasies, failures join it too);
* ``l = u U + (1 - u) sum_k w_k l_k`` and ``g = u U + (1 - u) sum_k w_k g_k``
  with a uniform share ``u``; candidates are drawn from ``l`` and the one
  with the largest ``l / g`` is proposed (the task-weighted Parzen mixture of
  Watanabe, Awad, Onishi & Hutter, IJCAI 2023);
* the weights ``w`` are re-estimated after every result by
  :func:`~warmstart.search.ranking.ranking_weights`: the share of bootstrap
  resamples of the scored configs in which a model (a past task's ``l_i /
  g_i``, or the task's own ratio predicted out of sample) misranks the
  fewest pairs, with weight dilution (Feurer, Letham & Bakshy, 2018).
  Profile similarity only sets the starting weights (ties share by it);
* the new task's own weight never falls below ``n / (n + own_strength)``
  after ``n`` scored configs;
* optionally, the first ``n_hedge`` queries cover, greedily, the top sets
  of as many weighted past tasks as possible (Wistuba, Schilling &
  Schmidt-Thieme, 2015), with the weights as they stand after each result;
* a share ``explore`` of the queries are space-filling, so the scores can
  contradict past tasks that all point to the same wrong region;
* an optional prior factor ``pi(x) ** (prior_power / (n + 1))`` on the
  acquisition (``pi`` the similarity-weighted mixture of the past tasks'
  good densities) decays with the number of results (Hvarfner et al., ICLR
  2022).

A proposal is a function of the seed and the history alone (recorded trials
and pending configs), so a search rebuilt with :meth:`MixtureSearch.from_dict`
and given the same trials proposes the same configs.
"""

from __future__ import annotations

import math
import weakref
from typing import Mapping

import numpy as np

from warmstart.prior import Prior, PriorError
from warmstart.search.kde import KDEStack, MixedKDE, log_sum_exp, uniform_logpdf
from warmstart.search.density import default_n_startup
from warmstart.search.ranking import chance_share, greedy_cover, luck_losses, ranking_losses, weights_from_losses
from warmstart.search.strategy import SearchError, SearchStrategy
from warmstart.search.subsets import subset_logpdf
from warmstart.space import Space, unit_distances

#: Recorded rows whose past tasks' scores are computed together (:meth:`MixtureSearch._past_scores`).
_SCORE_BLOCK = 8

__all__ = ["MixtureSearch", "MIXTURE_FORMAT"]

MIXTURE_FORMAT = "warmstart-mixture/1"
#: prior -> {(space, options of the past tasks' densities) -> what _build_sources returns}; the
#: entries go when the prior does (a replay runs many searches on one prior)
_BUILT: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()
_SCORES = ("ratio", "nearest")
_CHANCE = ("tie", "luck")


def _nearest_quantile(space: Space, X: np.ndarray, quantile: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Quantile of the recorded config of a source nearest to each row."""
    return quantile[np.argmin(unit_distances(space, rows, X), axis=1)]


class _SourceModel:
    """A past study's good and rest densities and its top set (built once)."""

    def __init__(self, space: Space, X: np.ndarray, quantile: np.ndarray, gamma: float,
                 cover_fraction: float, shrink: float):
        self.X = X
        self.quantile = quantile
        m = X.shape[0]
        order = np.argsort(-quantile, kind="stable")
        n_good = max(1, math.ceil(gamma * m))
        self.good = MixedKDE(space, X[order[:n_good]], shrink=shrink)
        self.rest = MixedKDE(space, X[order[n_good:]], shrink=shrink) if m > n_good else None
        n_top = max(1, math.ceil(cover_fraction * m))
        self.top_rows = X[order[:n_top]]
        self.top_threshold = float(quantile[order[n_top - 1]])


def _check_options(*, gamma, source_gamma, cover_fraction, uniform, cover_pool, explore, n_hedge, n_candidates,
                   n_boot, max_ranked, own_strength, prior_power, shrink, exact_share, adaptive_design, cover,
                   source_score, chance, max_good, max_rest) -> None:
    """Refuse an option of :class:`MixtureSearch` outside what it accepts, naming it."""
    for name, value in (("gamma", gamma), ("source_gamma", source_gamma),
                        ("cover_fraction", cover_fraction), ("uniform", uniform),
                        ("cover_pool", cover_pool)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= 1:
            raise SearchError(f"{name} must be a number in (0, 1], got {value!r}")
    if isinstance(explore, bool) or not isinstance(explore, (int, float)) or not 0 <= explore <= 1:
        raise SearchError(f"explore must be a number in [0, 1], got {explore!r}")
    if uniform >= 1:
        raise SearchError(f"uniform must be below 1 so the past tasks count at all, got {uniform!r}")
    for name, value, low in (("n_hedge", n_hedge, 0), ("n_candidates", n_candidates, 1),
                             ("n_boot", n_boot, 1), ("max_ranked", max_ranked, 2),
                             ("max_good", max_good, 1), ("max_rest", max_rest, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise SearchError(f"{name} must be a whole number >= {low}, got {value!r}")
    for name, value in (("own_strength", own_strength), ("prior_power", prior_power), ("shrink", shrink)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not (value >= 0 and math.isfinite(value)):
            raise SearchError(f"{name} must be a finite number >= 0, got {value!r}")
    if isinstance(exact_share, bool) or not isinstance(exact_share, (int, float)) or not 0 <= exact_share <= 1:
        raise SearchError(f"exact_share must be a number in [0, 1], got {exact_share!r}")
    if not isinstance(adaptive_design, (bool, np.bool_)):
        raise SearchError(f"adaptive_design must be True or False, got {adaptive_design!r}")
    if cover not in ("top", "soft"):
        raise SearchError(f"cover must be 'top' or 'soft', got {cover!r}")
    if chance not in _CHANCE:
        raise SearchError(f"chance must be one of {', '.join(_CHANCE)}, got {chance!r}")
    if source_score not in _SCORES:
        raise SearchError(f"source_score must be one of {', '.join(_SCORES)}, got {source_score!r}")


class MixtureSearch(SearchStrategy):
    """Warm Parzen-estimator search over a weighted mixture of past tasks.

    Parameters
    ----------
    space : Space
        The search space.
    prior : Prior
        Where the past tasks come from: its :attr:`~warmstart.prior.Prior.sources`
        (configs encoded in ``space``, within-study quantiles) and their
        profile ``similarity`` (the starting weights).
    seed : int, default 0
        Source of randomness. Proposals depend only on the seed and the
        history, so a rebuilt search proposes the same.
    maximize : bool, default True
        Whether larger scores are better.
    gamma : float, default 0.25
        Share of the new task's scored configs in its good set (at least one).
    source_gamma : float, default 0.15
        Share of each past study's configs in its good set (a fixed share
        between 0.1 and 0.25 is common practice for Parzen estimators).
    n_hedge : int, default 0
        Queries chosen by greedy coverage of the past tasks' top sets before
        the mixture takes over. Measured on the starter history (design half,
        docs/experiments.md): three hedges raised the gain on gbt and svm and
        lowered it on knn and forest, with more tasks worse than cold; the
        mixture's own first proposals hedge by weight, so none is the default.
    cover_fraction : float, default 0.1
        Share of each past study's configs that makes its top set.
    own_strength : float, default 10
        ``kappa`` of the floor ``n / (n + kappa)`` on the new task's own weight
        after ``n`` scored configs (a pseudo-count: our choice, the budget at
        which the task's own model carries half the mixture).
    uniform : float, default 0.1
        Uniform share ``u`` of both densities (so no region is ever ruled
        out, and about that share of candidates are uniform draws).
    n_candidates : int, default 24
        Candidates drawn from ``l`` per proposal (common practice for
        Parzen-estimator searches).
    n_boot : int, default 256
        Bootstrap resamples of the ranking-loss weights.
    max_ranked : int, default 40
        Most scored configs the weights are estimated on (the latest ones),
        which bounds the cost of a long search.
    max_good, max_rest : int, default 64 and 256
        Caps on the kernel centres of the new task's own good density (the
        best configs) and rest density (a random subsample of the recorded
        ones, drawn again at every result; the pending configs join it on
        top), as the cold :class:`~warmstart.search.density.DensitySearch`
        has, so that a proposal stays fast in a study of thousands of trials.
        They bind only beyond ``max_good / gamma`` scored configs.
    prior_power : float, default 0
        ``beta`` of the decaying prior factor ``pi(x) ** (beta / (n + 1))``
        (0: none).
    source_score : {"ratio", "nearest"}, default "ratio"
        How a past task orders configs when it is weighted: by its density
        ratio ``l_i / g_i``, or by the quantile of its nearest recorded config.
    shrink : float, default 1
        Pseudo-observations of the uniform pooled into every density's spread
        (see :class:`~warmstart.search.kde.MixedKDE`).
    explore : float, default 0.1
        Share of space-filling queries (the points of a scrambled Sobol
        sequence, in order, as a cold search starts): the first query after
        the hedge (the second without a hedge), then one in every
        ``1 / explore``. They let the scores contradict past tasks that
        all point to the same wrong region. 0: none.
    cover : {"top", "soft"}, default "top"
        Greedy coverage of the hedge: ``top`` counts the weight of past tasks
        whose top set (``cover_fraction``) a config enters; ``soft`` the rise
        of the weighted best quantile reached in every past task.
    exact_share : float, default 0.5
        Share of the candidates drawn from a past task's good density that
        are its good configs themselves, without kernel noise (configs that
        did well before are candidates as they are).
    cover_pool : float, default 1
        Share of the coverage candidates (by weighted mean quantile over the
        past tasks) the hedge may pick from: below 1 it covers top sets only
        among configs the weighted past tasks rate highly on average.
    adaptive_design : bool, default True
        Also make as many space-filling queries as the Sobol start of a cold
        search (``min(10, max(5, d + 1))``) times the share of bootstrap
        resamples in which no past task orders the scores better than
        chance: past tasks that all mislead turn the search into a cold one.
    chance : {"tie", "luck"}, default "tie"
        The bar a past task must pass to order the scores "better than
        chance" (for the uniform-sampling competitor of the weights and for
        ``adaptive_design``). ``tie``: a model that predicts a tie
        everywhere (half the pairs misranked). ``luck``: the fewest pairs
        the best of the past tasks misranks on shuffled scores
        (:func:`~warmstart.search.ranking.luck_losses`). With many past
        tasks one of them beats ``tie`` by luck in almost every resample,
        so under ``tie`` uniform sampling and the space-filling design never
        win weight however uninformative the past tasks are.

    Examples
    --------
    >>> from warmstart.prior import Source, prior_from_sources, within_study_quantiles
    >>> space = Space.from_dict({"params": {"x": {"type": "real", "low": -2, "high": 2}}})
    >>> X = space.sobol_unit(32, 0)                      # a past study of (x - 0.5)^2
    >>> past = (4 * X[:, 0] - 2 - 0.5) ** 2
    >>> source = Source(1, 1, "past task", X, within_study_quantiles(past, maximize=False),
    ...                 numbers=np.arange(32), clipped=np.zeros(32, dtype=bool))
    >>> search = MixtureSearch(space, prior_from_sources(space, [source]), seed=0, maximize=False)
    >>> for _ in range(6):
    ...     config = search.propose()
    ...     _ = search.record(config, (config["x"] - 0.5) ** 2)
    >>> abs(search.best.config["x"] - 0.5) < 0.2
    True
    """

    def __init__(
        self,
        space: Space,
        prior: Prior,
        seed: int = 0,
        maximize: bool = True,
        gamma: float = 0.25,
        source_gamma: float = 0.15,
        n_hedge: int = 0,
        cover_fraction: float = 0.1,
        own_strength: float = 10.0,
        uniform: float = 0.1,
        n_candidates: int = 24,
        n_boot: int = 256,
        max_ranked: int = 40,
        prior_power: float = 0.0,
        source_score: str = "ratio",
        shrink: float = 1.0,
        explore: float = 0.1,
        cover: str = "top",
        exact_share: float = 0.5,
        cover_pool: float = 1.0,
        adaptive_design: bool = True,
        chance: str = "tie",
        max_good: int = 64,
        max_rest: int = 256,
    ):
        super().__init__(space, seed=seed, maximize=maximize)
        sources = getattr(prior, "sources", None)
        if not sources:
            raise SearchError("prior must be a warmstart Prior with at least one source (past study); "
                              "build one with Archive.build_prior")
        _check_options(gamma=gamma, source_gamma=source_gamma, cover_fraction=cover_fraction, uniform=uniform,
                       cover_pool=cover_pool, explore=explore, n_hedge=n_hedge, n_candidates=n_candidates,
                       n_boot=n_boot, max_ranked=max_ranked, own_strength=own_strength, prior_power=prior_power,
                       shrink=shrink, exact_share=exact_share, adaptive_design=adaptive_design, cover=cover,
                       source_score=source_score, chance=chance, max_good=max_good, max_rest=max_rest)
        self.prior = prior
        self.options = {
            "gamma": float(gamma), "source_gamma": float(source_gamma), "n_hedge": int(n_hedge),
            "cover_fraction": float(cover_fraction), "own_strength": float(own_strength),
            "uniform": float(uniform), "n_candidates": int(n_candidates), "n_boot": int(n_boot),
            "max_ranked": int(max_ranked), "prior_power": float(prior_power),
            "source_score": source_score, "shrink": float(shrink), "explore": float(explore),
            "cover": cover, "exact_share": float(exact_share),
            "cover_pool": float(cover_pool), "adaptive_design": bool(adaptive_design), "chance": chance,
            "max_good": int(max_good), "max_rest": int(max_rest),
        }
        self.__dict__.update(self.options)
        kept = [s for s in sources if s.X.shape[0] > 0]
        for s in kept:
            if s.X.ndim != 2 or s.X.shape[1] != space.dim:
                raise SearchError(f"source study {s.study_id} ({s.task!r}) has configs of {s.X.shape[1]} "
                                  f"coordinates; the space has {space.dim} (align it onto the space first)")
        if not kept:
            raise SearchError("no source of the prior has a scored config")
        self.sources = kept
        sim = np.array([max(float(s.similarity), 0.0) for s in kept])
        self.start_weights = sim / sim.sum() if sim.sum() > 0 and np.isfinite(sim).all() else np.full(len(kept), 1 / len(kept))
        key = (space.content_hash, self.source_gamma, self.cover_fraction, self.shrink)
        built = _BUILT.setdefault(prior, {}).get(key)
        if built is None:  # the past tasks' densities do not depend on the seed: built once per prior
            built = _BUILT[prior][key] = self._build_sources()
        (self._models, self._good, self._has_rest, self._rest, self._cover_rows, self._cover_q,
         self._cover_top) = built
        self._score_blocks: dict[int, np.ndarray] = {}  # past tasks' scores at recorded rows, by block
        self._weights_at: tuple | None = None
        self._basis_at: tuple[int, int] | None = None  # (trial count, its weights basis)
        self._own_at: tuple | None = None  # (trial count, good density, its rows' indices, rest rows)
        self._design: np.ndarray | None = None  # scrambled Sobol points of the space-filling queries

    def _build_sources(self) -> tuple:
        """Every past task's good and rest densities (stacked, evaluated in one pass) and the
        candidates of the hedge with the quantile each past task gives them."""
        space = self.space
        models = [_SourceModel(space, s.X, s.quantile, self.source_gamma, self.cover_fraction, self.shrink)
                  for s in self.sources]
        self._models = models
        has_rest = np.array([m.rest is not None for m in models])
        rest = KDEStack([m.rest for m in models if m.rest is not None]) if has_rest.any() else None
        top = space.snap(np.vstack([m.top_rows for m in models]))
        _, first = np.unique(np.round(np.nan_to_num(top, nan=-1.0), 9), axis=0, return_index=True)
        cover_rows = top[np.sort(first)]
        cover_q = self._quantiles(cover_rows)
        return (models, KDEStack([m.good for m in models]), has_rest, rest, cover_rows, cover_q,
                self._in_top(cover_q))

    # -- past tasks seen at rows ------------------------------------------
    def _quantiles(self, rows: np.ndarray) -> np.ndarray:
        return np.column_stack([_nearest_quantile(self.space, s.X, s.quantile, rows) for s in self.sources])

    def _in_top(self, Q: np.ndarray) -> np.ndarray:
        return Q >= np.array([m.top_threshold for m in self._models])[None, :] - 1e-12

    def _source_logs(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``log l_i`` and ``log g_i`` of every past task at rows, each (m, n_sources)."""
        lg = self._good.logpdf(rows)
        lr = np.repeat(uniform_logpdf(self.space, rows)[:, None], len(self._models), axis=1)
        if self._rest is not None:
            lr[:, self._has_rest] = self._rest.logpdf(rows)
        return lg, lr

    def _source_scores(self, rows: np.ndarray) -> np.ndarray:
        if self.source_score == "nearest":
            return self._quantiles(rows)
        lg, lr = self._source_logs(rows)
        return lg - lr

    def _observe(self) -> None:
        """Nothing at a result: the past tasks' scores at recorded rows are computed
        when the weights need them (:meth:`_past_scores`)."""

    def _past_scores(self, keep: np.ndarray) -> np.ndarray:
        """Every past task's score at the recorded rows ``keep`` (ascending), shape
        (len(keep), n_sources).

        Computed in blocks of :data:`_SCORE_BLOCK` rows that start at multiples of
        it and end at the last row asked for at the latest: a complete block once,
        then kept, the last, incomplete one afresh each time. The blocks depend on
        the rows asked for alone, so the scores never depend on when they were
        asked for: a search resumed with all its results at once scores as the
        one that took them one by one.
        """
        if not keep.size:
            return np.empty((0, len(self.sources)))
        B, end = _SCORE_BLOCK, int(keep[-1]) + 1  # the last block ends with the rows asked for
        rows = self.rows()
        parts = []
        for start in range(int(keep[0]) // B * B, end, B):
            block = self._score_blocks.get(start)
            if block is None:
                block = self._source_scores(rows[start:min(start + B, end)])
                if block.shape[0] == B:
                    self._score_blocks[start] = block
            parts.append(block)
        first = int(keep[0]) // B * B
        for start in [k for k in self._score_blocks if k < first]:  # the window only moves on
            del self._score_blocks[start]
        return np.vstack(parts)[keep - first]

    # -- the new task's own model -------------------------------------------
    def _own_densities(self, rows: np.ndarray, y: np.ndarray, extra_rest: np.ndarray | None = None):
        """Good and rest densities of scored rows (``y``: NaN = failed, joins the rest)."""
        good, rest_idx = self._own_good(rows, y)
        return good, self._own_rest(rows[rest_idx], extra_rest)

    def _own_good(self, rows: np.ndarray, y: np.ndarray) -> tuple[MixedKDE | None, np.ndarray]:
        """The good density of scored rows (at most ``max_good`` centres) and
        the indices of the rest (a subsample of ``max_rest`` beyond that, drawn
        from the seed and the row count, so a rebuilt search draws the same)."""
        good, rest = self._own_split(y)
        return (None if good is None else MixedKDE(self.space, rows[good], shrink=self.shrink)), rest

    def _own_split(self, y: np.ndarray) -> tuple[np.ndarray | None, np.ndarray]:
        """Indices of the good rows (best first; None when nothing is scored) and of the rest."""
        ok = np.flatnonzero(~np.isnan(y))
        if ok.size == 0:
            rest = np.arange(len(y))
        else:
            order = ok[np.argsort(-y[ok], kind="stable")]
            n_good = min(self.max_good, max(1, math.ceil(self.gamma * ok.size)))
            rest = np.concatenate([order[n_good:], np.flatnonzero(np.isnan(y))])
        if rest.size > self.max_rest:
            rng = np.random.default_rng(self._rng_key(4, n_pending=0, trials=len(y)))
            rest = rest[np.sort(rng.choice(rest.size, self.max_rest, replace=False))]
        return (None if ok.size == 0 else order[:n_good]), rest

    def _own_rest(self, rest_rows: np.ndarray, extra_rest: np.ndarray | None) -> MixedKDE | None:
        if extra_rest is not None and extra_rest.shape[0]:
            rest_rows = np.vstack([rest_rows, extra_rest])
        return MixedKDE(self.space, rest_rows, shrink=self.shrink) if rest_rows.shape[0] else None

    def _own_now(self) -> tuple[MixedKDE | None, MixedKDE | None]:
        """The task's own good and rest densities for a proposal: the good one
        is kept until the next result (pending configs join only the rest)."""
        n = self.trial_count
        if self._own_at is None or self._own_at[0] != n:
            good_idx, rest_idx = self._own_split(self.signed_scores())
            good = None
            if good_idx is not None:
                last = self._own_at
                if last is not None and last[2] is not None and np.array_equal(last[2], good_idx):
                    good = last[1]  # recorded rows never change: the same good rows, the same density
                else:
                    good = MixedKDE(self.space, self.rows()[good_idx], shrink=self.shrink)
            self._own_at = (n, good, good_idx, self.rows()[rest_idx])
        _, good, _, rest_rows = self._own_at
        return good, self._own_rest(rest_rows, self.pending_rows())

    def _own_out_of_sample(self, rows: np.ndarray, y: np.ndarray) -> np.ndarray:
        """The own ratio ``l_0 / g_0`` at each row, fitted without it (up to 20 folds).

        Every fold's good and rest densities are fitted and evaluated at once
        (:func:`~warmstart.search.subsets.subset_logpdf`: the densities of
        :meth:`_own_densities`, to rounding).
        """
        n = rows.shape[0]
        n_folds = min(n, 20)
        folds = np.arange(n) % n_folds
        out = np.full(n, np.nan)
        lu = uniform_logpdf(self.space, rows)
        members, queries, of, sign = [], [], [], []
        for f in range(n_folds):
            test = np.flatnonzero(folds == f)
            train = np.flatnonzero(folds != f)
            ok = train[~np.isnan(y[train])]
            if ok.size == 0:  # no scored config to fit the good density on
                continue
            order = ok[np.argsort(-y[ok], kind="stable")]
            n_good = max(1, math.ceil(self.gamma * ok.size))
            good = np.zeros(n, dtype=bool)
            good[order[:n_good]] = True
            rest = np.zeros(n, dtype=bool)
            rest[train] = True
            rest &= ~good
            out[test] = 0.0
            for subset, s in ((good, 1.0), (rest, -1.0)):
                if subset.any():
                    members.append(subset)
                    queries.append(test)
                    of.append(np.full(test.size, len(members) - 1))
                    sign.append(np.full(test.size, s))
                else:  # no rest: the uniform density
                    out[test] -= lu[test]
        if members:
            q = np.concatenate(queries)
            values = subset_logpdf(self.space, rows, np.array(members), q, np.concatenate(of), shrink=self.shrink)
            np.add.at(out, q, np.concatenate(sign) * values)
        return out

    # -- weights ------------------------------------------------------------
    def current_weights(self) -> tuple[np.ndarray, float]:
        """Weights of the past tasks and of the task's own model.

        With :attr:`uniform_weight` they sum to one; the fixed ``uniform``
        share of the densities comes on top. Computed from the recorded
        trials only: at every result while the study has at most
        ``max_ranked`` of them, then from the first :meth:`weights_basis`
        trials, which moves on every ``max_ranked / 10`` results (a tenth of
        the ranked window turned over), then on every tenth of the trial
        count (the new task's own weight has a floor of ``n / (n +
        own_strength)`` by then, so the past tasks' share changes little). A
        rule of the trial count alone, so a search resumed from the archive
        weighs as the one kept in memory.
        """
        n = self.weights_basis()
        if self._weights_at is not None and self._weights_at[0] == n:
            return self._weights_at[1], self._weights_at[3]
        y = self.signed_scores()[:n]
        ok = ~np.isnan(y)
        n_ok = int(ok.sum())
        keep = np.arange(n)[-self.max_ranked:]
        S = len(self.sources)
        own_col = None
        # the models: every past task, uniform sampling (predicts a tie everywhere, so a
        # past task that orders the scores worse than chance loses to it), the task's own
        pred = self._past_scores(keep)
        P = np.column_stack([pred, np.zeros(keep.size)])
        start = np.append(self.start_weights, self.uniform)
        if n_ok >= 3:  # the own model can be judged out of sample
            own_pred = self._own_out_of_sample(self.rows()[:n][keep], y[keep])
            P = np.column_stack([P, own_pred])
            start = np.append(start, 1.0 / S)
            own_col = S + 1
        yy = np.where(np.isnan(y[keep]), -np.inf, y[keep])
        # the bootstrap's draws depend on the recorded trials alone (pending counted as none, as
        # after a result in a sequential search), so the weights do not depend on when they were
        # first asked for: a search resumed with pending leases weighs as the one kept in memory
        rng = np.random.default_rng(self._rng_key(1, n_pending=0, trials=n))
        loss = ranking_losses(P, yy, self.n_boot, rng)
        if self.chance == "luck" and keep.size >= 2:  # the competitor: the best past task on shuffled scores
            loss[:, S] = luck_losses(pred, yy, self.n_boot, rng)
        w = weights_from_losses(loss, start, own_col)
        chance = chance_share(loss, np.arange(S), S) if keep.size >= 2 else 0.0
        w_own = float(w[own_col]) if own_col is not None else 0.0
        floor = n_ok / (n_ok + self.own_strength) if self.own_strength > 0 else 1.0
        if n_ok and w_own < floor:  # the floor's share comes from the others in proportion
            rest = w[: S + 1]
            w = np.append(rest / rest.sum() * (1.0 - floor) if rest.sum() > 0 else rest, floor)
            w_own = floor
        self._weights_at = (n, w[:S].copy(), float(w[S]), w_own, chance)
        return self._weights_at[1], self._weights_at[3]

    def weights_basis(self) -> int:
        """How many of the recorded trials (the first ones) the current weights
        are estimated from: all of them up to ``max_ranked``, then the last
        point at or below the trial count of a grid that starts at
        ``max_ranked`` and grows by ``max(max_ranked // 10, g // 10)`` from each
        point ``g`` (a tenth of the window, then a tenth of the count: at most
        about ``10 log(n / max_ranked)`` estimates in ``n`` results beyond the
        window, where the new task's own weight already has a floor of
        ``n / (n + own_strength)``)."""
        n, g = self.trial_count, self.max_ranked
        if n <= g:
            return n
        if self._basis_at is not None and self._basis_at[0] == n:  # asked several times per proposal
            return self._basis_at[1]
        step = max(1, g // 10)
        while True:
            nxt = g + max(step, g // 10)
            if nxt > n:
                self._basis_at = (n, g)
                return g
            g = nxt

    @property
    def uniform_weight(self) -> float:
        """Weight the ranking gives uniform sampling (on top of the fixed ``uniform`` share)."""
        self.current_weights()
        return self._weights_at[2]

    @property
    def chance_share(self) -> float:
        """Share of bootstrap resamples of the scored configs in which no past task
        orders the scores better than chance (the bar set by ``chance``)."""
        self.current_weights()
        return self._weights_at[4]

    def weight_table(self):
        """Current weights as a DataFrame: one row per past study, uniform sampling
        and the task's own model, heaviest first (the weights sum to one)."""
        import pandas as pd

        w_src, w_own = self.current_weights()
        frame = pd.DataFrame({
            "study_id": [s.study_id for s in self.sources] + [None, None],
            "task": [s.task for s in self.sources] + ["(uniform)", "(this task)"],
            "similarity": list(self.start_weights) + [float("nan"), float("nan")],
            "weight": list(w_src) + [self.uniform_weight, w_own],
        })
        return frame.sort_values("weight", ascending=False, kind="stable").reset_index(drop=True)

    # -- proposals ------------------------------------------------------------
    def _rng_key(self, salt: int, n_pending: int | None = None, trials: int | None = None) -> list[int]:
        base = self.seed if isinstance(self.seed, (int, np.integer)) and not isinstance(self.seed, bool) else 0
        return [int(base) & 0xFFFFFFFF, self.trial_count if trials is None else trials,
                self.n_pending if n_pending is None else n_pending, salt]

    def _proposal_rng(self) -> np.random.Generator:
        if isinstance(self.seed, (int, np.integer)) and not isinstance(self.seed, bool):
            return np.random.default_rng(self._rng_key(2))
        return self._rng  # a Generator was given: its own stream

    def _design_needed(self, t: int) -> int:
        """Space-filling queries due by query ``t`` (from 0): one right after the
        hedge (at the second query without one), then one in every
        ``1 / explore``; and, with ``adaptive_design``, as many of the points a
        cold search would start with as the share of bootstrap resamples in
        which no past task orders the scores better than chance."""
        start = max(self.n_hedge, 1)
        if t < start:
            return 0
        due = (t - start) // max(1, round(1.0 / self.explore)) + 1 if self.explore > 0 else 0
        if self.adaptive_design:
            self.current_weights()
            due = max(due, round(default_n_startup(self.space.dim) * self._weights_at[4]))
        return min(due, t)

    def _design_rows(self, n: int) -> np.ndarray:
        """The first ``n`` (or more) points of the search's scrambled Sobol sequence."""
        if self._design is None or self._design.shape[0] < n:
            self._design = self.space.sobol_unit(max(16, 2 * n), self._design_seed())
        return self._design

    def _propose_one(self) -> tuple[dict, str]:
        rng = self._proposal_rng()
        t = self.trial_count + self.n_pending
        if t < self.n_hedge:
            config = self._hedge(rng)
            if config is not None:
                return config, "cover"
        due = self._design_needed(t)
        if due:
            rows = self._design_rows(due + 8)[:due]
            known = self._known_rows(rows)
            if known.sum() < due:  # the next Sobol point not tried yet (a rebuilt search takes the same)
                fresh = np.flatnonzero(~known)
                return self.space.decode(rows[fresh[0]][None, :])[0], "design"
        return self._model_proposal(rng), "model"

    def _design_seed(self):
        if isinstance(self.seed, (int, np.integer)) and not isinstance(self.seed, bool):
            return np.random.default_rng([int(self.seed) & 0xFFFFFFFF, 3])
        return self._rng

    def _hedge(self, rng: np.random.Generator) -> dict | None:
        w_src, _ = self.current_weights()
        tried = np.vstack([self.rows(), self.pending_rows()])
        covered = np.zeros(len(self.sources), dtype=bool)
        best = np.zeros(len(self.sources))
        if tried.shape[0]:
            Q = self._quantiles(tried)
            covered = self._in_top(Q).any(axis=0)
            best = Q.max(axis=0)
        allowed = ~self._known_rows(self._cover_rows)
        if self.cover_pool < 1:  # only configs the weighted past tasks rate highly on average
            mean_q = self._cover_q @ w_src
            cut = np.quantile(mean_q, 1.0 - self.cover_pool)
            allowed &= mean_q >= cut
        pick = greedy_cover(self._cover_top, self._cover_q, w_src, covered, allowed,
                            best=best if self.cover == "soft" else None)
        if pick is None:
            return None
        return self.space.complete(self.space.decode(self._cover_rows[pick][None, :])[0], rng)

    def _model_proposal(self, rng: np.random.Generator) -> dict:
        space = self.space
        w_src, w_own = self.current_weights()
        y = self.signed_scores()
        w_unif = self.uniform_weight
        good0, rest0 = self._own_now()
        if good0 is None:  # nothing scored yet: the own share goes to the past tasks
            w_own = 0.0
        u = self.uniform
        active = np.flatnonzero(w_src > 1e-4 * max(w_src.max(), 1e-300))
        ws = w_src[active]
        mix = np.concatenate([[u + (1 - u) * w_unif], (1 - u) * ws, [(1 - u) * w_own]])
        mix = mix / mix.sum()
        counts = rng.multinomial(self.n_candidates, mix)
        draws = [space.sample_unit(counts[0], rng)]
        for k, i in enumerate(active):
            m = counts[1 + k]
            if m:
                good = self._models[i].good
                exact = rng.binomial(m, self.exact_share)  # centres as they are, the rest with kernel noise
                draws.append(good.centres[good.pick(exact, rng)])
                draws.append(good.sample(m - exact, rng))
        if counts[-1]:
            draws.append(good0.sample(counts[-1], rng))
        C = np.vstack(draws)
        lu = uniform_logpdf(space, C)
        LG, LR = self._source_logs(C)
        L = [lu, *LG[:, active].T]
        G = [lu, *LR[:, active].T]
        if w_own > 0:
            L.append(good0.logpdf(C))
            G.append(lu if rest0 is None else rest0.logpdf(C))
        b = mix if w_own > 0 else mix[:-1]
        b = b / b.sum()
        score = log_sum_exp(np.column_stack(L), b=b) - log_sum_exp(np.column_stack(G), b=b)
        if self.prior_power > 0:
            n_ok = int((~np.isnan(y)).sum())
            sw = self.start_weights
            pi = log_sum_exp(np.column_stack([lu, LG]), b=np.concatenate([[u], (1 - u) * sw]))
            score = score + self.prior_power / (n_ok + 1) * (pi - lu)
        fresh = ~self._known_rows(C)
        if fresh.any():
            score = np.where(fresh, score, -np.inf)
        return space.complete(space.decode(C[int(np.argmax(score))][None, :])[0], rng)

    # -- what it was built from -----------------------------------------------
    def to_dict(self) -> dict:
        """Plain data that rebuilds this search (:meth:`from_dict`): the prior it
        was built from, the options and the seed (the trials are not included)."""
        if not (isinstance(self.seed, (int, np.integer)) and not isinstance(self.seed, bool)):
            raise SearchError("only a search with a whole-number seed can be written down and rebuilt")
        return {"format": MIXTURE_FORMAT, "seed": int(self.seed), "maximize": self.maximize,
                "options": dict(self.options), "prior": self.prior.to_dict()}

    @classmethod
    def from_dict(cls, d: Mapping, where: str = "warm search") -> "MixtureSearch":
        """Rebuild a search written by :meth:`to_dict` (record its trials again to resume)."""
        if not isinstance(d, Mapping) or d.get("format") != MIXTURE_FORMAT:
            raise SearchError(f"{where}: not a mixture warm search (expected format {MIXTURE_FORMAT!r}, "
                              f"got {d.get('format') if isinstance(d, Mapping) else type(d).__name__!r})")
        unknown = set(d.get("options", {})) - set(cls._option_names())
        if unknown:
            raise SearchError(f"{where}: unknown option(s) {', '.join(sorted(unknown))}; "
                              f"known: {', '.join(cls._option_names())}")
        try:
            prior = Prior.from_dict(d["prior"], where=f"{where}: prior")
        except KeyError as exc:
            raise SearchError(f"{where}: missing field {exc.args[0]!r}") from None
        except PriorError as exc:
            raise SearchError(str(exc)) from None
        return cls(prior.space, prior, seed=d.get("seed", 0), maximize=d.get("maximize", True),
                   **d.get("options", {}))

    @staticmethod
    def _option_names() -> tuple[str, ...]:
        return ("gamma", "source_gamma", "n_hedge", "cover_fraction", "own_strength", "uniform",
                "n_candidates", "n_boot", "max_ranked", "prior_power", "source_score", "shrink", "explore", "cover",
                "exact_share", "cover_pool", "adaptive_design", "chance", "max_good", "max_rest")
