"""Baseline searches the density search is compared with.

All have the propose/record shape of :class:`~warmstart.search.strategy.SearchStrategy`
and work on the unit-cube encoding of a :class:`~warmstart.space.Space`:

* :class:`RandomSearch` — uniform draws;
* :class:`SobolSearch` — a scrambled Sobol sequence (:class:`scipy.stats.qmc.Sobol`);
* :class:`NelderMeadSearch` — :func:`scipy.optimize.minimize` with
  ``method="Nelder-Mead"`` on the unit cube, driven one point at a time, with
  restarts from a random point when it converges;
* :class:`GPSearch` — a Gaussian-process regression
  (:class:`sklearn.gaussian_process.GaussianProcessRegressor`, Matern kernel;
  the model of :mod:`warmstart.search.gp`) with expected improvement
  maximised over random candidates.

Choice coordinates are handled by rounding (``Space.from_unit``); the same
seed gives the same sequence.
"""

from __future__ import annotations

import math
import queue
import threading
from typing import Any

import numpy as np
from scipy.optimize import minimize
from scipy.special import ndtr
from scipy.stats import qmc

from warmstart._checks import check_count, check_number
from warmstart.search.density import default_n_startup
from warmstart.search.gp import SEARCH_KERNEL, conditional_columns, fit_gp, gp_features
from warmstart.space import Space
from warmstart.search.strategy import SearchError, SearchStrategy, Trial

__all__ = ["RandomSearch", "SobolSearch", "NelderMeadSearch", "GPSearch", "expected_improvement"]


class RandomSearch(SearchStrategy):
    """Uniform random search.

    Parameters
    ----------
    space : Space
        The search space.
    seed : int or numpy Generator, default 0
        Source of randomness.
    maximize : bool, default True
        Whether larger scores are better.
    """

    def _propose_one(self) -> tuple[dict, str]:
        return self.space.decode(self.space.sample_unit(1, self._rng))[0], "random"


class SobolSearch(SearchStrategy):
    """Scrambled Sobol sequence, one point per proposal.

    The points are those of ``scipy.stats.qmc.Sobol(d, scramble=True,
    rng=numpy.random.default_rng(seed))``, in order, mapped with
    :meth:`Space.from_unit`.

    Parameters
    ----------
    space : Space
        The search space.
    seed : int or numpy Generator, default 0
        Seed of the scrambling.
    maximize : bool, default True
        Whether larger scores are better.
    """

    def __init__(self, space: Space, seed: Any = 0, maximize: bool = True):
        super().__init__(space, seed=seed, maximize=maximize)
        self._engine = qmc.Sobol(d=space.dim, scramble=True, rng=self._rng)

    def _propose_one(self) -> tuple[dict, str]:
        # one point at a time: the first draw (n=1) is a power of two, so
        # SciPy's balance warning does not apply, and the stream is unchanged
        return self.space.decode(self.space.from_unit(self._engine.random(1)))[0], "design"


class _Stop(Exception):
    """Raised inside the objective of a running simplex to end it."""


_STOP = object()


class NelderMeadSearch(SearchStrategy):
    """Nelder–Mead simplex on the unit cube, with random restarts.

    :func:`scipy.optimize.minimize` (``method="Nelder-Mead"``, bounds
    ``[0, 1]`` per coordinate) runs in a helper thread; each point it
    evaluates becomes a proposal, and :meth:`record` hands the score back
    (failed trials count as worse than the worst score seen). When the
    simplex converges it restarts from a uniform random point. The search is
    sequential: extra configs of ``propose(k)`` while a simplex point is
    pending are uniform random draws. Call :meth:`close` (or use the search
    as a context manager) to end the helper thread early.

    Parameters
    ----------
    space : Space
        The search space.
    seed : int or numpy Generator, default 0
        Source of randomness (restart points).
    maximize : bool, default True
        Whether larger scores are better.
    initial_step : float, default 0.2
        Edge length of the starting simplex in unit-cube coordinates.
    xatol, fatol : float, default 1e-4 and 1e-8
        Convergence tolerances passed to SciPy.
    """

    def __init__(self, space: Space, seed: Any = 0, maximize: bool = True,
                 initial_step: float = 0.2, xatol: float = 1e-4, fatol: float = 1e-8):
        super().__init__(space, seed=seed, maximize=maximize)
        self.initial_step = check_number("initial_step", initial_step, 0.0, 1.0, low_open=True, error=SearchError,
                                         fix="it is the simplex's edge in unit-cube coordinates, e.g. 0.2")
        self.options = {"xatol": float(xatol), "fatol": float(fatol)}
        self._ask: queue.Queue = queue.Queue()
        self._tell: queue.Queue = queue.Queue()
        self._thread: threading.Thread | None = None
        self._waiting: str | None = None
        self._worst = -math.inf
        self._best = math.inf
        self.n_restarts = 0

    def initial_simplex(self, x0: np.ndarray) -> np.ndarray:
        """Starting simplex: ``x0`` and one step along each axis, kept inside the cube."""
        d = x0.size
        steps = np.where(x0 + self.initial_step <= 1.0, self.initial_step, -self.initial_step)
        return np.vstack([x0, x0 + np.diag(steps)]) if d else x0[None, :]

    def _run(self) -> None:
        d = self.space.dim
        try:
            while True:
                x0 = self._rng.random(d)
                minimize(self._value, x0, method="Nelder-Mead", bounds=[(0.0, 1.0)] * d,
                         options={**self.options, "initial_simplex": self.initial_simplex(x0)})
                self.n_restarts += 1
        except _Stop:
            return
        except Exception as exc:  # handed to the main thread, raised there
            self._ask.put(("error", exc))

    def _value(self, u: np.ndarray) -> float:
        self._ask.put(("ask", np.array(u, dtype=float)))
        value = self._tell.get()
        if value is _STOP:
            raise _Stop
        return value

    def _propose_one(self) -> tuple[dict, str]:
        if self._waiting is not None:
            return self.space.decode(self.space.sample_unit(1, self._rng))[0], "random"
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="nelder-mead", daemon=True)
            self._thread.start()
        kind, payload = self._ask.get()
        if kind == "error":
            raise payload
        config = self.space.decode(self.space.from_unit(payload[None, :]))[0]
        self._waiting = self.space.canonical_json(config)
        return config, "simplex"

    def record(self, config, score=None, status=None) -> Trial:
        trial = super().record(config, score, status)
        if trial.score is not None:
            value = -trial.score if self.maximize else trial.score  # minimised
            self._worst = max(self._worst, value)
            self._best = min(self._best, value)
        if self._waiting is not None and self.space.canonical_json(trial.config) == self._waiting:
            self._waiting = None
            if trial.score is None:  # failed: worse than anything seen
                spread = self._worst - self._best if math.isfinite(self._worst) else 0.0
                value = (self._worst if math.isfinite(self._worst) else 0.0) + max(spread, 1.0)
            self._tell.put(value)
        return trial

    def close(self) -> None:
        """End the helper thread (the search cannot propose afterwards)."""
        if self._thread is not None and self._thread.is_alive():
            self._tell.put(_STOP)
            self._thread.join(timeout=5)

    def __enter__(self) -> "NelderMeadSearch":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def expected_improvement(mean: np.ndarray, std: np.ndarray, best: float, xi: float = 0.0) -> np.ndarray:
    """Expected improvement over ``best`` of a normal prediction (maximisation).

    ``EI = (mean - best - xi) Phi(z) + std phi(z)`` with
    ``z = (mean - best - xi) / std``; where ``std == 0`` it is
    ``max(mean - best - xi, 0)``.

    Parameters
    ----------
    mean, std : array
        Predictive mean and standard deviation.
    best : float
        Best value observed so far.
    xi : float, default 0
        Margin that favours exploration.
    """
    mean = np.asarray(mean, dtype=float)
    std = np.asarray(std, dtype=float)
    imp = mean - best - xi
    safe = np.where(std > 0, std, 1.0)
    z = imp / safe
    ei = imp * ndtr(z) + safe * np.exp(-0.5 * z**2) / math.sqrt(2 * math.pi)
    return np.where(std > 0, np.maximum(ei, 0.0), np.maximum(imp, 0.0))


class GPSearch(SearchStrategy):
    """Gaussian-process search with expected improvement.

    Starts with the same Sobol design as a cold
    :class:`~warmstart.search.density.DensitySearch`, then fits
    :class:`sklearn.gaussian_process.GaussianProcessRegressor` (constant ×
    Matern 5/2 with one length scale per input, plus white noise; targets
    normalised; :data:`~warmstart.search.gp.SEARCH_KERNEL`) to the encoded
    rows and proposes the candidate with the largest expected improvement.
    Candidates: uniform draws plus Gaussian perturbations of the best
    configs. Inputs are :func:`~warmstart.search.gp.gp_features`: a choice
    becomes one indicator per level, and a parameter with a condition gets
    an "active" indicator (inactive values enter as 0). Failed and pending
    configs get the worst score seen (a constant liar), so the model steers
    away from them and a batch spreads.

    Parameters
    ----------
    space : Space
        The search space.
    seed : int or numpy Generator, default 0
        Source of randomness.
    maximize : bool, default True
        Whether larger scores are better.
    n_startup : int, optional
        Size of the Sobol design; default ``min(10, max(5, d + 1))``.
    n_candidates : int, default 2000
        Candidates scored by expected improvement per proposal.
    xi : float, default 0.0
        Exploration margin of the expected improvement (in normalised units).
    n_restarts_optimizer : int, default 1
        Restarts of the kernel hyperparameter optimiser.
    """

    def __init__(self, space: Space, seed: Any = 0, maximize: bool = True,
                 n_startup: int | None = None, n_candidates: int = 2000, xi: float = 0.0,
                 n_restarts_optimizer: int = 1):
        super().__init__(space, seed=seed, maximize=maximize)
        n_startup = default_n_startup(space.dim) if n_startup is None else n_startup
        self.n_startup = check_count("n_startup", n_startup, minimum=0, error=SearchError)
        self.n_candidates = check_count("n_candidates", n_candidates, minimum=1, error=SearchError)
        self.xi = check_number("xi", xi, low=0.0, error=SearchError,
                               fix="it is the exploration margin in normalised units, e.g. 0.0 or 0.01")
        self.n_restarts_optimizer = check_count("n_restarts_optimizer", n_restarts_optimizer, minimum=0,
                                                error=SearchError)
        self._design = space.sobol_unit(self.n_startup, self._rng) if self.n_startup else None
        self._design_used = 0
        self._conditional = conditional_columns(space)

    def features(self, X: np.ndarray) -> np.ndarray:
        """GP inputs of encoded rows (:func:`~warmstart.search.gp.gp_features`)."""
        return gp_features(self.space, X, self._conditional)

    def _propose_one(self) -> tuple[dict, str]:
        if (self._design is not None and self._design_used < self.n_startup
                and self.trial_count + self.n_pending < self.n_startup):
            row = self._design[self._design_used]
            self._design_used += 1
            return self.space.decode(row[None, :])[0], "design"
        y = self.signed_scores()
        ok = ~np.isnan(y)
        if ok.sum() < 2:
            return self.space.decode(self.space.sample_unit(1, self._rng))[0], "random"
        worst = float(np.nanmin(y))
        X = np.vstack([self.rows(), self.pending_rows()])
        target = np.concatenate([np.where(ok, y, worst), np.full(self.n_pending, worst)])
        random_state = int(self._rng.integers(2**31 - 1))  # drawn before the candidates
        best_rows = self.rows()[ok][np.argsort(-y[ok])[:5]]
        n_local = self.n_candidates // 4
        local = best_rows[self._rng.integers(0, best_rows.shape[0], n_local)]
        local = local + self._rng.normal(0.0, 0.05, local.shape)
        local[:, self.space.is_choice] = np.round(local[:, self.space.is_choice])
        C = np.vstack([self.space.sample_unit(self.n_candidates - n_local, self._rng),
                       self.space.snap(local)])
        gp = fit_gp(self.features(X), target, SEARCH_KERNEL, self.n_restarts_optimizer, random_state)
        mean, std = gp.predict(self.features(C), return_std=True)
        ei = expected_improvement(mean, std, float(np.max(target)), self.xi * float(np.std(target)))
        ei = np.where(self._known_rows(C), -np.inf, ei)
        return self.space.decode(C[int(np.argmax(ei))][None, :])[0], "model"
