"""The density search, and the bookkeeping every search strategy shares.

:class:`DensitySearch` is a Parzen-estimator search (DESIGN.md section 6):
finished trials are split into a *good* set (the best ``gamma`` fraction)
and the *rest*; ``l(x)`` is a kernel density of the good set mixed with the
prior and a uniform floor, ``g(x)`` a kernel density of the rest (plus the
same floor); candidates are drawn from ``l`` and the one with the largest
``l(x) / g(x)`` is proposed. A cold search starts with a scrambled Sobol
design; a warm search starts with the prior's seeds, alternating with a
shorter design.

Every strategy (this one and the baselines in :mod:`warmstart.search.baselines`)
derives from :class:`~warmstart.search.strategy.SearchStrategy`, which validates
and records results once; :func:`~warmstart.search.strategy.run_search` (also
importable from here) is the one loop that evaluates an objective with any
of them.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np
from scipy.special import ndtr
from scipy.stats import rankdata

from warmstart._checks import check_count, check_fraction, check_number
from warmstart.errors import SpaceError
from warmstart.search.kde import MixedKDE, log_sum_exp, uniform_logpdf
from warmstart.space import Space, unit_distances
from warmstart.search.strategy import SearchError, SearchResult, SearchStrategy, Trial, run_search

__all__ = ["DensitySearch", "SearchError", "SearchResult", "SearchStrategy", "Trial", "run_search",
           "default_n_startup"]


def default_n_startup(dim: int) -> int:
    """Size of a cold search's space-filling start: ``min(10, max(5, dim + 1))``
    (common practice: about one point per dimension, at least a handful)."""
    return min(10, max(5, dim + 1))


#: Seeds a warm search takes from its prior by default (DEVELOPERS.md, "Start", has the
#: measurements behind ten and the bolder five).
DEFAULT_N_SEEDS = 10


class DensitySearch(SearchStrategy):
    """Density (Parzen-estimator) search over a space, cold or warm.

    Parameters
    ----------
    space : Space
        The search space.
    prior : object, optional
        A prior over the space (``None``: cold start). It must offer
        ``strength`` (float, the effective sample size ``n0``),
        ``sample_unit(n, rng)`` and ``logpdf_unit(X)`` on encoded rows, and
        ``seeds`` (configs to try first, may be empty); ``reweight(X, y,
        maximize)`` returning a new prior is used when present.
    seed : int or numpy Generator, default 0
        Source of randomness; the same seed and the same results give the
        same sequence of proposals.
    maximize : bool, default True
        Whether larger scores are better.
    gamma : float, optional
        Fraction of the finished trials in the good set (at least one
        trial). Default 0.15 for a cold search and 0.25 for a warm one (a
        fixed fraction between 0.1 and 0.25 is common practice; see Notes
        for why a warm search takes the upper end).
    n_startup : int, optional
        Size of the Sobol design. Default for a cold search: ``min(10,
        max(5, d + 1))`` for ``d`` parameters (common practice: about one
        point per dimension, at least a handful); for a warm search 1, put
        after the seeds (see Notes).
    n_candidates : int, default 24
        Candidates drawn from ``l`` per proposal.
    n_seeds : int, default 10
        Most configs a warm search takes from the prior's ranked seeds before
        its model takes over. The seeds are re-ranked after every result
        (``prior.reweight``), so the search learns which past tasks to trust;
        the seed phase also ends as soon as the guard distrusts the prior
        (``trust() < min_trust`` with four or more results).
    min_trust : float, default 0.5
        Guard level below which a warm search stops taking seeds.
    seed_radius : float, default 0.2
        A seed closer than this (unit-cube distance) to a tried config that
        scored below the best so far is passed over while farther seeds
        remain, so the seed phase does not dwell in a region already seen to
        be mediocre (a local penalisation; the radius is our choice).
    floor : float, default 0.1
        Weight of the uniform density in ``l`` and ``g``. It never reaches
        zero, so no region is ever ruled out.
    max_good, max_rest : int, default 64 and 256
        Caps on the kernel centres of ``l`` (the best ones) and ``g`` (a
        random subsample) so that a proposal stays fast with many trials.
    reweight_every : int, default 5
        Call ``prior.reweight`` after this many new finished trials.
    bandwidth : {"scott", "silverman"} or float, default "scott"
        Bandwidth rule of the kernel densities (see :class:`MixedKDE`).
    shrink : float, optional
        Pseudo-observations pooled into the spread of each density before
        the rule applies (our choice; see :class:`MixedKDE`), so that a
        tight cluster of a few good configs does not collapse the search.
        Default 2.0 for a cold search, whose good set shrinks toward the
        uniform spread, and 0.5 for a warm one, whose good set shrinks
        toward the prior's narrower spread.

    Notes
    -----
    Failed trials (score ``None``/NaN/inf, or ``status="failed"``) never
    get a number: they are kept out of the good set and added to ``g``
    (a failed config counts as a bad one), and in the guard they rank below
    every scored trial. Pending configs (proposed, not yet recorded) also
    join ``g``, the "constant liar" with the worst value, so a batch from
    ``propose(k)`` spreads out.

    The prior's weight in ``l`` is ``alpha = n0 f / (n0 f + n)`` with ``n``
    finished trials. ``f`` is the negative-transfer guard: with at least
    four finished trials, ``rho`` is the Spearman correlation between the
    prior's log density at the observed configs and their scores, and
    ``f = Phi(rho * sqrt(n - 1))`` (the one-sided normal approximation of
    its significance). A prior whose ranking agrees clearly keeps ``f``
    near 1; an insignificant one halves its strength, a contradicted one
    loses it. The weight the prior loses to the guard,
    ``n0 / (n0 + n) - alpha``, goes to the uniform density, not to the good
    set, so a distrusted prior turns into exploration. The uniform floor
    stays either way. The good set's bandwidths shrink toward the prior's
    spread (as far as ``f`` trusts it) instead of the uniform's.

    A warm search's first trials are the prior's seeds, picked because past
    tasks did well there, so they sit close together and most are good.
    With the cold split (15 %) the good set after five seeds is a single
    config, and the other four seeds, a few steps away, form the rest
    density that ``l / g`` flees: the search left the region its seeds had
    found (on the starter history, leave-one-task-out, the per-query hit
    rate fell from 0.38 at the fifth seed to 0.11 over the next two
    queries). Hence the warm defaults: a quarter of the trials in the good
    set, a sharper good-set kernel, and one design point after the seeds.
    That one point lets the guard see a config of low prior density early:
    with none, a prior centred on the worst region cost up to 0.75 bits
    against cold on the synthetic valley of the tests; with one it cost at
    most 0.28; two cost the replay about 0.2 bits more.

    A warm search first proposes up to ``n_seeds`` of the prior's seeds,
    re-ranked after every result, then ``n_startup`` points of a Sobol
    design, then its model.

    Examples
    --------
    >>> space = Space.from_dict({"params": {"x": {"type": "real", "low": -2, "high": 2}}})
    >>> search = DensitySearch(space, seed=1, maximize=False)
    >>> for _ in range(15):
    ...     config = search.propose()
    ...     _ = search.record(config, (config["x"] - 0.5) ** 2)
    >>> abs(search.best.config["x"] - 0.5) < 0.3
    True
    """

    def __init__(
        self,
        space: Space,
        prior: Any = None,
        seed: Any = 0,
        maximize: bool = True,
        gamma: float | None = None,
        n_startup: int | None = None,
        n_candidates: int = 24,
        n_seeds: int = DEFAULT_N_SEEDS,
        min_trust: float = 0.5,
        seed_radius: float = 0.2,
        floor: float = 0.1,
        max_good: int = 64,
        max_rest: int = 256,
        reweight_every: int = 5,
        bandwidth: Any = "scott",
        shrink: float | None = None,
    ):
        super().__init__(space, seed=seed, maximize=maximize)
        warm = prior is not None
        if gamma is None:
            gamma = 0.25 if warm else 0.15
        if shrink is None:
            shrink = 0.5 if warm else 2.0
        check_fraction("gamma", gamma, error=SearchError,
                       fix="it is the share of finished trials in the good set, e.g. 0.15")
        check_fraction("floor", floor, error=SearchError,
                       fix="it is the uniform density's weight, above 0 so no region is ruled out, e.g. 0.1")
        for name, value in (("n_candidates", n_candidates), ("max_good", max_good),
                            ("max_rest", max_rest), ("reweight_every", reweight_every)):
            check_count(name, value, minimum=1, error=SearchError)
        if n_startup is None:
            n_startup = 1 if warm else default_n_startup(space.dim)
        check_count("n_startup", n_startup, minimum=0, error=SearchError)
        self.gamma = float(gamma)
        self.n_candidates = int(n_candidates)
        self.floor = float(floor)
        self.max_good = int(max_good)
        self.max_rest = int(max_rest)
        self.reweight_every = int(reweight_every)
        self.bandwidth = bandwidth
        self.shrink = float(shrink)
        self.prior = prior
        self.initial_prior = prior
        self._prior_lp = np.empty(0)  # prior log density of recorded rows (cache)
        self._reweighted_at = 0
        self.n_startup = int(n_startup)
        # drawn first from the search's generator: equals scipy.stats.qmc.Sobol
        # with scramble=True and rng=numpy.random.default_rng(seed)
        self._design = space.sobol_unit(self.n_startup, self._rng)
        if prior is not None:
            for attr in ("strength", "sample_unit", "logpdf_unit", "seeds"):
                if not hasattr(prior, attr):
                    raise SearchError(
                        f"prior lacks {attr!r}; a prior needs strength, sample_unit(n, rng), "
                        "logpdf_unit(X) and seeds (see DensitySearch)"
                    )
            strength = float(prior.strength)
            if not math.isfinite(strength) or strength < 0:
                raise SearchError(f"prior.strength must be a finite number >= 0, got {prior.strength!r}")
            check_count("n_seeds", n_seeds, minimum=0, error=SearchError)
        self.n_seeds = int(n_seeds)
        self.min_trust = float(min_trust)
        self.seed_radius = check_number("seed_radius", seed_radius, low=0.0, error=SearchError,
                                        fix="it is a unit-cube distance, e.g. 0.2 (0 turns it off)")
        self._n_seeded = 0
        self._seed_reweighted_at = -1
        self._design_used = 0
        self._good_at: tuple | None = None  # ((trial count, id of the prior), good density, prior)
        self._trust_at: tuple | None = None  # ((trial count, id of the prior), trust, prior)

    # -- prior and guard ---------------------------------------------------
    def _valid_seeds(self, seeds: list) -> list[dict]:
        """Seeds as valid configs, in order, without repeats.

        A seed that is not valid in this space is carried over with
        :meth:`Space.align` and its missing parameters drawn uniformly.
        """
        out, keys = [], set()
        for seed in seeds:
            if not isinstance(seed, Mapping):
                raise SearchError(f"prior.seeds must hold config dicts, got {seed!r}")
            try:
                config = self.space.normalize(seed)
            except SpaceError:
                config = self.space.complete(self.space.align(seed).config, self._rng)
            key = self.space.canonical_json(config)
            if key not in keys:
                keys.add(key)
                out.append(config)
        return out

    def _update_prior(self) -> None:
        """Re-weight the prior now and then; keep its log densities cached."""
        n = self.trial_count
        ok = self._ok_mask()
        if (hasattr(self.prior, "reweight") and ok.sum() >= 3
                and n - self._reweighted_at >= self.reweight_every):
            X, raw = self.rows()[ok], self._raw_scores()[ok]
            self.prior = self.prior.reweight(X, raw, self.maximize)
            self._reweighted_at = n
            self._prior_lp = np.empty(0)
        have = self._prior_lp.size
        if have < n:
            new = np.asarray(self.prior.logpdf_unit(self.rows()[have:n]), dtype=float)
            self._prior_lp = np.concatenate([self._prior_lp, np.nan_to_num(new, nan=-np.inf)])

    def agreement(self) -> float:
        """Spearman correlation of the prior's log density and the scores.

        Failed trials rank below every scored one. NaN without a prior or
        with fewer than four finished trials.
        """
        if self.prior is None or self.trial_count < 4:
            return math.nan
        self._update_prior()
        y = np.nan_to_num(self.signed_scores(), nan=-np.inf)
        a = rankdata(self._prior_lp)
        b = rankdata(y)
        if a.std() == 0 or b.std() == 0:
            return 0.0
        return float(np.corrcoef(a, b)[0, 1])

    def trust(self) -> float:
        """Guard factor ``f`` in [0, 1]: how far the scores back the prior.

        ``Phi(rho * sqrt(n - 1))`` with ``rho`` from :meth:`agreement`; 1
        while fewer than four trials are finished.
        """
        if self.prior is not None and self.trial_count >= 4:
            self._update_prior()  # as agreement() would, so the key below names the prior it uses
        key = (self.trial_count, id(self.prior))
        if self._trust_at is not None and self._trust_at[0] == key:
            return self._trust_at[1]
        rho = self.agreement()
        value = 1.0 if math.isnan(rho) else float(ndtr(rho * math.sqrt(self.trial_count - 1)))
        self._trust_at = (key, value, self.prior)  # the prior is kept so its id is not reused
        return value

    @property
    def prior_weight(self) -> float:
        """Current weight ``alpha`` of the prior in ``l`` (0 without a prior)."""
        return self._mixture()["prior"] / (1.0 - self.floor)

    def _mixture(self, has_good: bool | None = None) -> dict[str, float]:
        """Weights of the components of ``l``: uniform, prior, good set."""
        if has_good is None:
            has_good = bool(self._ok_mask().any())
        w = {"uniform": self.floor, "prior": 0.0, "good": 0.0}
        rest = 1.0 - self.floor
        if self.prior is None:
            w["good" if has_good else "uniform"] += rest
            return w
        n0, n = float(self.prior.strength), self.trial_count
        f = self.trust()
        alpha0 = n0 / (n0 + n) if n0 + n > 0 else 0.0
        alpha = n0 * f / (n0 * f + n) if n0 * f + n > 0 else 0.0
        w["prior"] = rest * alpha
        w["uniform"] += rest * (alpha0 - alpha)  # distrusted prior mass goes to the uniform
        w["good" if has_good else "prior"] += rest * (1.0 - alpha0)
        return w

    # -- proposals ---------------------------------------------------------
    def _seeding(self) -> bool:
        """Whether a warm search still takes configs from the prior's seeds."""
        if self.prior is None or self._n_seeded >= self.n_seeds:
            return False
        return self.trial_count < 4 or self.trust() >= self.min_trust

    def _next_seed(self) -> dict | None:
        """The best-ranked seed not tried yet, after re-weighting on every result."""
        ok = self._ok_mask()
        n = self.trial_count
        if ok.sum() >= 2 and self._seed_reweighted_at != n and hasattr(self.prior, "reweight"):
            self.prior = self.prior.reweight(self.rows()[ok], self._raw_scores()[ok], self.maximize)
            self._seed_reweighted_at = n
            self._reweighted_at = n
            self._prior_lp = np.empty(0)
        y = self.signed_scores()
        scored = ~np.isnan(y)
        weak = self.rows()[scored & (y < np.max(y[scored]))] if scored.sum() >= 2 else self.rows()[:0]
        fallback = None
        for config in self._valid_seeds(list(self.prior.seeds or [])):
            row = self.space.encode([config])[0]
            if self._is_known(row):
                continue
            if weak.shape[0] and unit_distances(self.space, row[None, :], weak).min() < self.seed_radius**2:
                fallback = fallback or config
                continue
            return config
        return fallback

    def _propose_one(self) -> tuple[dict, str]:
        if self._seeding():
            config = self._next_seed()
            if config is not None:
                self._n_seeded += 1
                return config, "seed"
            self._n_seeded = self.n_seeds  # no untried seed left
        if self._design_used < len(self._design) and self.trial_count + self.n_pending < self.n_startup + self._n_seeded:
            row = self._design[self._design_used]
            self._design_used += 1
            return self.space.decode(row[None, :])[0], "design"
        return self._model_proposal(), "model"

    def _n_good(self, n_ok: int) -> int:
        return min(self.max_good, max(1, math.ceil(self.gamma * n_ok))) if n_ok else 0

    def _model_proposal(self) -> dict:
        space, rng = self.space, self._rng
        X = self.rows()
        y = self.signed_scores()
        ok = np.flatnonzero(~np.isnan(y))
        order = ok[np.argsort(-y[ok], kind="stable")]
        n_good = self._n_good(ok.size)
        good = order[:n_good]
        rest = np.concatenate([order[n_good:], np.flatnonzero(np.isnan(y))])
        rest_rows = np.vstack([X[rest], self.pending_rows()])
        if rest_rows.shape[0] > self.max_rest:
            rest_rows = rest_rows[rng.choice(rest_rows.shape[0], self.max_rest, replace=False)]
        good_kde = self._good_density(X[good]) if good.size else None
        rest_kde = self._kde(rest_rows) if rest_rows.shape[0] else None
        mix = self._mixture(has_good=good_kde is not None)
        parts = [(name, w) for name, w in mix.items() if w > 0]
        total = sum(w for _, w in parts)
        weights = np.array([w / total for _, w in parts])
        counts = rng.multinomial(self.n_candidates, weights)
        draws = []
        for (name, _), m in zip(parts, counts):
            if m == 0:
                continue
            if name == "uniform":
                draws.append(space.sample_unit(m, rng))
            elif name == "prior":
                draws.append(space.snap(self.prior.sample_unit(m, rng)))
            else:
                draws.append(good_kde.sample(m, rng))
        C = np.vstack(draws)
        lu = uniform_logpdf(space, C)
        comp = {"uniform": lu}
        if mix["prior"] > 0:
            comp["prior"] = np.nan_to_num(np.asarray(self.prior.logpdf_unit(C), float), nan=-np.inf)
        if mix["good"] > 0:
            comp["good"] = good_kde.logpdf(C)
        log_l = log_sum_exp(np.column_stack([comp[name] for name, _ in parts]), b=weights)
        if rest_kde is None:
            log_g = lu
        else:
            log_g = np.logaddexp(math.log(self.floor) + lu, math.log1p(-self.floor) + rest_kde.logpdf(C))
        score = log_l - log_g
        fresh = ~self._known_rows(C)
        if fresh.any():
            score = np.where(fresh, score, -np.inf)
        return space.decode(C[int(np.argmax(score))][None, :])[0]

    def _good_density(self, rows: np.ndarray) -> MixedKDE:
        """The good set's density; kept until the next result or a new prior (pending
        configs change only the rest, so the proposals of one batch share it)."""
        key = (self.trial_count, id(self.prior))
        if self._good_at is None or self._good_at[0] != key:
            self._good_at = (key, self._kde(rows, self._shrink_target()), self.prior)
        return self._good_at[1]

    def _kde(self, rows: np.ndarray, shrink_to: np.ndarray | None = None) -> MixedKDE:
        return MixedKDE(self.space, rows, bandwidth=self.bandwidth, shrink=self.shrink,
                        shrink_to=shrink_to)

    def _prior_spread(self) -> np.ndarray:
        """Per-coordinate spread of the prior (std, or dispersion for choices),
        from 512 of its draws; cached until the prior changes."""
        if getattr(self, "_spread_of", None) is not self.prior:
            space = self.space
            S = space.snap(self.prior.sample_unit(512, self._rng))
            lev = space.n_levels
            spread = np.empty(space.dim)
            for j in range(space.dim):  # loop over coordinates, not points
                col = S[:, j][~np.isnan(S[:, j])]
                if space.is_choice[j]:
                    p = np.bincount(col.astype(int), minlength=lev[j]) / max(col.size, 1)
                    spread[j] = 1.0 - np.dot(p, p) if col.size else (lev[j] - 1) / lev[j]
                else:
                    spread[j] = col.std() if col.size > 1 else 1.0
            self._spread, self._spread_of = spread, self.prior
        return self._spread

    def _shrink_target(self) -> np.ndarray | None:
        """Spread the good-set bandwidths shrink toward: the prior's, as far
        as the guard trusts it; the uniform's for a cold search."""
        if self.prior is None:
            return None
        t = self.trust()
        lev = self.space.n_levels.astype(float)
        uniform = np.where(self.space.is_choice, (lev - 1) / np.maximum(lev, 1), 1.0 / math.sqrt(12.0))
        prior = np.minimum(self._prior_spread(), uniform)
        ch = self.space.is_choice
        return np.where(ch, t * prior + (1 - t) * uniform,
                        np.sqrt(t * prior**2 + (1 - t) * uniform**2))

    def _observe(self) -> None:
        if self.prior is not None:
            self._update_prior()

