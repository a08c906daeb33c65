"""The one Gaussian-process model (warmstart.search.gp), checked against scikit-learn's
GaussianProcessRegressor built by hand, and shared by GPSearch and the replay surrogate."""

import warnings

import numpy as np
import pytest
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from threadpoolctl import threadpool_limits

from warmstart.search.baselines import GPSearch
from warmstart.search.gp import SEARCH_KERNEL, SURROGATE_KERNEL, conditional_columns, fit_gp, gp_features
from warmstart.search.testfunctions import branin
from warmstart.space import Space

COND = Space.from_dict({"params": {
    "C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    "kernel": {"type": "choice", "choices": ["linear", "rbf", "poly"]},
    "gamma": {"type": "real", "low": 1e-4, "high": 10.0, "log": True, "when": {"kernel": ["rbf", "poly"]}},
    "degree": {"type": "integer", "low": 2, "high": 5, "when": {"kernel": ["poly"]}},
}})


@pytest.fixture(autouse=True)
def one_blas_thread():
    with threadpool_limits(limits=1):
        yield


@pytest.mark.parametrize("settings, restarts", [(SEARCH_KERNEL, 1), (SURROGATE_KERNEL, 2)])
def test_fit_gp_is_scikit_learns_regressor_with_the_documented_kernel(settings, restarts):
    # reference: GaussianProcessRegressor with constant * Matern(5/2) + white, written out here
    f = branin()
    X = f.space.sobol_unit(24, 0)
    y = np.array([f(c) for c in f.space.decode(X)])
    ours = fit_gp(X, y, settings, n_restarts=restarts, random_state=3)
    kernel = (ConstantKernel(1.0, settings.amplitude_bounds)
              * Matern(length_scale=[settings.length_scale] * 2, length_scale_bounds=settings.length_scale_bounds,
                       nu=2.5)
              + WhiteKernel(settings.noise, settings.noise_bounds))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        theirs = GaussianProcessRegressor(kernel, normalize_y=True, n_restarts_optimizer=restarts,
                                          random_state=3).fit(X, y)
    grid = f.space.sample_unit(200, 1)
    np.testing.assert_allclose(ours.predict(grid), theirs.predict(grid), rtol=1e-10, atol=1e-10)
    assert ours.kernel_ == theirs.kernel_


def test_gp_search_and_the_surrogate_share_one_encoding():
    X = COND.encode([{"C": 1.0, "kernel": "linear"}, {"C": 10.0, "kernel": "poly", "gamma": 0.1, "degree": 3}])
    search = GPSearch(COND, seed=0)
    # C, three kernel indicators, gamma and its active flag, degree and its active flag
    F = search.features(X)
    assert F.shape == (2, 8)
    np.testing.assert_array_equal(F, gp_features(COND, X, conditional_columns(COND)))
    assert F[0, 1:4].tolist() == [1.0, 0.0, 0.0] and F[0, 4:].tolist() == [0.0, 0.0, 0.0, 0.0]
    assert F[1, 5] == 1.0 and F[1, 7] == 1.0
    assert conditional_columns(COND).tolist() == [False, False, True, True]


def test_gp_search_on_a_conditional_space_proposes_valid_configs_from_its_model():
    rng = np.random.default_rng(0)
    search = GPSearch(COND, seed=1, n_candidates=200, n_restarts_optimizer=0)
    for config in COND.sample(12, rng):
        search.record(config, -abs(np.log10(config["C"]) - 1) - 0.3 * (config["kernel"] == "linear"))
    config = search.propose()
    COND.validate(config)
    assert search.n_pending == 1

