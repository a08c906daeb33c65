"""Tests of the baseline searches against SciPy and scikit-learn behaviour."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, optimize, stats
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from warmstart.search.baselines import (
    GPSearch,
    NelderMeadSearch,
    RandomSearch,
    SobolSearch,
    expected_improvement,
)
from warmstart.search.density import SearchError, run_search
from warmstart.space import Space

UNIT2 = Space.from_dict({"params": {"a": {"type": "real", "low": 0.0, "high": 1.0},
                                    "b": {"type": "real", "low": 0.0, "high": 1.0}}})
COND = Space.from_dict({"params": {
    "C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    "kernel": {"type": "choice", "choices": ["linear", "rbf", "poly"]},
    "gamma": {"type": "real", "low": 1e-4, "high": 10.0, "log": True,
              "when": {"kernel": ["rbf", "poly"]}},
    "degree": {"type": "integer", "low": 2, "high": 5, "when": {"kernel": ["poly"]}},
}})


def quad2(config):
    return (config["a"] - 0.3) ** 2 + 2 * (config["b"] - 0.7) ** 2


def cond_score(config):
    s = -abs(math.log10(config["C"]) - 1)
    if config["kernel"] != "linear":
        s -= abs(math.log10(config["gamma"]) + 2)
    return s - 0.1 * config.get("degree", 0)


@pytest.fixture(autouse=True)
def one_blas_thread():
    # small GP fits are much slower with many BLAS threads on a busy machine
    with threadpool_limits(limits=1):
        yield


def make(cls, space, seed, maximize=True):
    kwargs = {"n_candidates": 300, "n_restarts_optimizer": 0} if cls is GPSearch else {}
    return cls(space, seed=seed, maximize=maximize, **kwargs)


ALL = [RandomSearch, SobolSearch, NelderMeadSearch, GPSearch]


@pytest.mark.parametrize("cls", ALL)
def test_same_seed_same_sequence_and_valid_configs(cls):
    # reference: Space.validate for validity
    runs = []
    for _ in range(2):
        search = make(cls, COND, 7)
        result = run_search(search, cond_score, 14)
        if hasattr(search, "close"):
            search.close()
        for c in result.configs:
            COND.validate(c)
        runs.append(result.configs)
    assert runs[0] == runs[1]


@pytest.mark.parametrize("cls", ALL)
def test_failed_trials_and_batches(cls):
    search = make(cls, COND, 1)
    for i in range(12):
        for c in search.propose(2 if i % 4 == 3 else 1):
            COND.validate(c)
            search.record(c, None if c["kernel"] == "poly" else cond_score(c))
    hist = search.history
    assert set(hist["status"]) <= {"ok", "failed"}
    assert hist.loc[hist["status"] == "failed", "score"].isna().all()
    assert search.best.status == "ok"
    assert search.n_pending == 0
    if hasattr(search, "close"):
        search.close()


def test_sobol_search_equals_scipy_stream():
    # reference: scipy.stats.qmc.Sobol(scramble=True) with the same seed
    search = SobolSearch(COND, seed=11)
    got = [search.propose() for _ in range(8)]
    U = qmc.Sobol(d=COND.dim, scramble=True, rng=np.random.default_rng(11)).random_base2(3)
    assert got == COND.decode(COND.from_unit(U))


def test_random_search_is_uniform():
    # reference: scipy.stats.kstest against U(0, 1)
    search = RandomSearch(UNIT2, seed=3)
    a = [search.propose()["a"] for _ in range(500)]
    assert stats.kstest(a, "uniform").pvalue > 0.01


def test_nelder_mead_follows_scipy_exactly():
    # reference: scipy.optimize.minimize(method="Nelder-Mead") run directly from the
    # same start and simplex; the ask/tell wrapper must evaluate the same points
    seed = 4
    search = NelderMeadSearch(UNIT2, seed=seed, maximize=False)
    x0 = np.random.default_rng(seed).random(2)
    seen = []

    def f(u):
        seen.append(np.array(u))
        return quad2({"a": u[0], "b": u[1]})

    ref = optimize.minimize(f, x0, method="Nelder-Mead", bounds=[(0, 1)] * 2,
                            options={"xatol": 1e-4, "fatol": 1e-8,
                                     "initial_simplex": search.initial_simplex(x0)})
    result = run_search(search, quad2, len(seen) + 5)
    got = np.array([[c["a"], c["b"]] for c in result.configs[:len(seen)]])
    np.testing.assert_allclose(got, np.array(seen), rtol=0, atol=1e-12)
    assert search.n_restarts == 1  # converged once, then restarted
    assert result.best.score == pytest.approx(ref.fun, abs=1e-12)
    search.close()
    assert not search._thread.is_alive()


def test_nelder_mead_survives_failures():
    search = NelderMeadSearch(UNIT2, seed=0, maximize=False)
    result = run_search(search, lambda c: float("nan") if c["a"] > 0.8 else quad2(c), 120)
    search.close()
    assert "failed" in result.statuses
    assert result.best.score < 1e-3


@settings(max_examples=40, deadline=None)
@given(st.floats(-3, 3), st.floats(0.01, 3), st.floats(-3, 3), st.floats(0, 0.5))
def test_expected_improvement_equals_quadrature(mean, std, best, xi):
    # reference: E[max(Y - best - xi, 0)] for Y ~ N(mean, std), scipy.integrate.quad
    ref, _ = integrate.quad(lambda y: (y - best - xi) * stats.norm.pdf(y, mean, std),
                            best + xi, mean + 12 * std if mean + 12 * std > best + xi else best + xi + 1)
    got = float(expected_improvement(np.array([mean]), np.array([std]), best, xi)[0])
    assert got == pytest.approx(ref, abs=1e-7, rel=1e-6)


def test_expected_improvement_without_uncertainty():
    ei = expected_improvement(np.array([1.0, -1.0]), np.array([0.0, 0.0]), 0.0)
    np.testing.assert_array_equal(ei, [1.0, 0.0])


def test_gp_search_beats_random_on_a_smooth_function():
    # reference: scipy.stats.wilcoxon (paired, one-sided) over 8 seeds
    gp, rnd = [], []
    for s in range(8):
        gp.append(run_search(make(GPSearch, UNIT2, s, maximize=False), quad2, 16).best_so_far[-1])
        rnd.append(run_search(RandomSearch(UNIT2, seed=50 + s, maximize=False), quad2, 16).best_so_far[-1])
    assert stats.wilcoxon(gp, rnd, alternative="less").pvalue < 0.01


def test_bad_arguments():
    with pytest.raises(SearchError, match="initial_step"):
        NelderMeadSearch(UNIT2, initial_step=2.0)
    with pytest.raises(SearchError, match="maximize must be True or False"):
        RandomSearch(UNIT2, maximize="yes")
    with pytest.raises(SearchError, match="space must be a warmstart Space"):
        SobolSearch({"a": 1})
    with pytest.raises(SearchError, match="n_candidates must be a whole number"):
        GPSearch(UNIT2, n_candidates=0)
    with pytest.raises(SearchError, match="xi must be a number"):
        GPSearch(UNIT2, xi=-1.0)
