"""Tests of warmstart.search.kde against SciPy and scikit-learn references."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats
from scipy.special import logsumexp
from sklearn.neighbors import KernelDensity

from warmstart.search.kde import KDEError, MixedKDE, log_sum_exp, uniform_logpdf
from warmstart.space import Space


def real_space(d):
    return Space.from_dict({"params": {f"x{i}": {"type": "real", "low": 0.0, "high": 1.0}
                                       for i in range(d)}})


MIXED = Space.from_dict({"params": {
    "x": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    "kind": {"type": "choice", "choices": ["a", "b", "c"]},
    "n": {"type": "integer", "low": 1, "high": 8, "when": {"kind": ["a", "b"]}},
    "flag": {"type": "choice", "choices": [True, False], "when": {"kind": ["c"]}},
}})


def test_1d_equals_scipy_gaussian_kde_away_from_bounds():
    # reference: scipy.stats.gaussian_kde (weighted, Scott's rule)
    rng = np.random.default_rng(0)
    c = rng.uniform(0.4, 0.6, 60)
    w = rng.random(60)
    ref = stats.gaussian_kde(c, weights=w)
    kde = MixedKDE(real_space(1), c[:, None], w)
    np.testing.assert_allclose(kde.bandwidths[0], math.sqrt(ref.covariance[0, 0]), rtol=1e-12)
    q = np.linspace(0.45, 0.55, 11)
    np.testing.assert_allclose(kde.pdf(q[:, None]), ref(q), rtol=1e-9)


@pytest.mark.parametrize("rule", ["scott", "silverman"])
def test_bandwidths_equal_scipy_covariance_diagonal(rule):
    # reference: scipy.stats.gaussian_kde covariance = factor**2 * weighted data covariance
    rng = np.random.default_rng(1)
    X = rng.uniform(0.2, 0.8, (40, 3))
    w = rng.random(40)
    ref = stats.gaussian_kde(X.T, bw_method=rule, weights=w)
    kde = MixedKDE(real_space(3), X, w, bandwidth=rule)
    np.testing.assert_allclose(kde.n_eff, ref.neff, rtol=1e-12)
    np.testing.assert_allclose(kde.bandwidths, np.sqrt(np.diag(ref.covariance)), rtol=1e-10)


def test_multivariate_equals_sklearn_kernel_density():
    # reference: sklearn.neighbors.KernelDensity (gaussian kernel, sample weights)
    rng = np.random.default_rng(2)
    X = rng.uniform(0.35, 0.65, (50, 4))
    w = rng.random(50) + 0.1
    h = 0.03
    ref = KernelDensity(bandwidth=h, kernel="gaussian").fit(X, sample_weight=w)
    kde = MixedKDE(real_space(4), X, w, bandwidth=np.full(4, h))
    q = rng.uniform(0.4, 0.6, (20, 4))
    np.testing.assert_allclose(kde.logpdf(q), ref.score_samples(q), rtol=1e-9, atol=1e-9)


def test_diagonal_bandwidths_equal_multivariate_normal_mixture():
    # reference: scipy.stats.multivariate_normal, brute-force weighted sum
    rng = np.random.default_rng(3)
    X = rng.uniform(0.4, 0.6, (15, 3))
    w = rng.random(15)
    h = np.array([0.02, 0.05, 0.03])
    kde = MixedKDE(real_space(3), X, w, bandwidth=h)
    q = rng.uniform(0.45, 0.55, (8, 3))
    ref = sum(wi / w.sum() * stats.multivariate_normal(xi, np.diag(h**2)).pdf(q) for xi, wi in zip(X, w))
    np.testing.assert_allclose(kde.pdf(q), ref, rtol=1e-9)


def test_truncated_kernel_equals_scipy_truncnorm():
    # reference: scipy.stats.truncnorm on [0, 1]
    c, h = 0.05, 0.2
    kde = MixedKDE(real_space(1), [[c]], bandwidth=[h])
    q = np.linspace(0.0, 1.0, 9)
    ref = stats.truncnorm((0 - c) / h, (1 - c) / h, loc=c, scale=h).pdf(q)
    np.testing.assert_allclose(kde.pdf(q[:, None]), ref, rtol=1e-10)


@pytest.mark.parametrize("centre", [0.0, 0.02, 0.5, 0.97, 1.0])
def test_truncated_kernels_integrate_to_one(centre):
    # reference: numeric quadrature, scipy.integrate.quad
    kde = MixedKDE(real_space(1), [[centre], [0.3]], [2.0, 1.0], bandwidth=[0.15])
    total, err = integrate.quad(lambda t: float(kde.pdf([[t]])[0]), 0.0, 1.0, points=[centre], limit=200)
    assert abs(total - 1.0) < 1e-8


def test_mixed_conditional_density_sums_to_one():
    # reference: scipy.integrate.quad over the real coordinate, exact sums over levels
    # and integers; inactive coordinates do not exist for the query
    space = Space.from_dict({"params": {
        "x": {"type": "real", "low": 0.0, "high": 1.0},
        "kind": {"type": "choice", "choices": ["a", "b"]},
        "n": {"type": "integer", "low": 1, "high": 3, "when": {"kind": ["a"]}},
    }})
    centres = space.encode([{"x": 0.1, "kind": "a", "n": 2}, {"x": 0.8, "kind": "b"}])
    kde = MixedKDE(space, centres, [1.0, 3.0], bandwidth=[0.2, 0.3, 0.25])
    total = 0.0
    # the integer coordinate is a continuous density on [0, 1]: integrate it too
    f_b = lambda t: float(kde.pdf([[t, 1.0, np.nan]])[0])
    total += integrate.quad(f_b, 0, 1)[0]
    f_a = lambda n, t: float(kde.pdf([[t, 0.0, n]])[0])
    total += integrate.dblquad(f_a, 0, 1, 0, 1, epsabs=1e-10)[0]
    assert abs(total - 1.0) < 1e-6


def test_aitchison_aitken_kernel():
    # reference: Aitchison & Aitken (1976) kernel, from memory:
    # K(x, c) = 1 - lam if x == c else lam / (k - 1)
    space = Space.from_dict({"params": {"k": {"type": "choice", "choices": list("abcd")}}})
    lam = 0.3
    kde = MixedKDE(space, [[2.0]], bandwidth=[lam])
    p = kde.pdf(np.arange(4.0)[:, None])
    np.testing.assert_allclose(p, [lam / 3, lam / 3, 1 - lam, lam / 3])
    assert abs(p.sum() - 1) < 1e-12


def test_scaling_weights_changes_nothing():
    # reference: invariance tested in sklearn/neighbors/tests/test_kde.py
    rng = np.random.default_rng(4)
    X = MIXED.sample_unit(30, rng)
    w = rng.random(30)
    q = MIXED.sample_unit(10, rng)
    a = MixedKDE(MIXED, X, w)
    b = MixedKDE(MIXED, X, 7.5 * w)
    np.testing.assert_allclose(a.bandwidths, b.bandwidths)
    np.testing.assert_allclose(a.logpdf(q), b.logpdf(q))


def test_integer_weights_equal_repeated_rows():
    # reference: invariance tested in sklearn/neighbors/tests/test_kde.py (fixed bandwidth)
    rng = np.random.default_rng(5)
    X = MIXED.sample_unit(12, rng)
    counts = rng.integers(1, 4, 12)
    h = np.array([0.1, 0.2, 0.15, 0.3])
    q = MIXED.sample_unit(10, rng)
    a = MixedKDE(MIXED, X, counts, bandwidth=h)
    b = MixedKDE(MIXED, np.repeat(X, counts, axis=0), bandwidth=h)
    np.testing.assert_allclose(a.logpdf(q), b.logpdf(q), rtol=1e-12)


def test_samples_follow_truncated_kernel():
    # reference: scipy.stats.kstest against scipy.stats.truncnorm (fixed seed)
    c, h = 0.1, 0.3
    kde = MixedKDE(real_space(1), [[c]], bandwidth=[h])
    draws = kde.sample(4000, np.random.default_rng(6))[:, 0]
    ref = stats.truncnorm((0 - c) / h, (1 - c) / h, loc=c, scale=h)
    assert stats.kstest(draws, ref.cdf).pvalue > 0.01


def test_sampled_choice_frequencies_match_density():
    # reference: scipy.stats.chisquare of sampled levels against the kernel's probabilities
    space = Space.from_dict({"params": {"k": {"type": "choice", "choices": list("abc")}}})
    kde = MixedKDE(space, [[0.0], [2.0]], [3.0, 1.0], bandwidth=[0.2])
    draws = kde.sample(6000, np.random.default_rng(7))[:, 0].astype(int)
    observed = np.bincount(draws, minlength=3)
    expected = kde.pdf(np.arange(3.0)[:, None]) * 6000
    assert stats.chisquare(observed, expected).pvalue > 0.01


def test_rule_bandwidths_shrink_with_more_centres():
    rng = np.random.default_rng(8)
    few = MixedKDE(real_space(2), rng.random((10, 2)))
    many = MixedKDE(real_space(2), rng.random((1000, 2)))
    assert (many.bandwidths < few.bandwidths).all()


def test_integer_bandwidth_at_least_one_cell():
    space = Space.from_dict({"params": {"n": {"type": "integer", "low": 1, "high": 10}}})
    kde = MixedKDE(space, space.encode([{"n": 4}] * 50))
    assert kde.bandwidths[0] >= 0.1


def test_log_sum_exp_equals_scipy():
    # reference: scipy.special.logsumexp
    rng = np.random.default_rng(9)
    A = rng.normal(size=(5, 7)) * 50
    A[0, :] = -np.inf
    b = rng.random(7)
    with np.errstate(divide="ignore"):
        np.testing.assert_allclose(log_sum_exp(A), logsumexp(A, axis=1))
        np.testing.assert_allclose(log_sum_exp(A, b), logsumexp(A, axis=1, b=b))


def test_uniform_logpdf_counts_active_choices():
    X = MIXED.encode([{"x": 1.0, "kind": "a", "n": 3}, {"x": 1.0, "kind": "c", "flag": True}])
    np.testing.assert_allclose(uniform_logpdf(MIXED, X), [-math.log(3), -math.log(3) - math.log(2)])


def test_bad_inputs_raise_clear_errors():
    space = real_space(2)
    with pytest.raises(KDEError, match=r"shape \(n, 2\)"):
        MixedKDE(space, np.zeros((3, 3)))
    with pytest.raises(KDEError, match="empty"):
        MixedKDE(space, np.zeros((0, 2)))
    with pytest.raises(KDEError, match="weights must have shape"):
        MixedKDE(space, np.zeros((3, 2)), [1.0, 2.0])
    with pytest.raises(KDEError, match="non-negative"):
        MixedKDE(space, np.zeros((2, 2)), [1.0, -2.0])
    with pytest.raises(KDEError, match="unknown"):
        MixedKDE(space, np.zeros((2, 2)), bandwidth="wide")
    with pytest.raises(KDEError, match=r"must lie in \[0, 1\]"):
        MixedKDE(space, [[1.5, 0.2]])
    with pytest.raises(KDEError, match="level indices"):
        MixedKDE(MIXED, [[0.5, 3.0, np.nan, 0.0]])
    with pytest.raises(KDEError, match="bandwidth of coordinate 1"):
        MixedKDE(MIXED, [[0.5, 1.0, 0.5, np.nan]], bandwidth=[0.1, 0.9, 0.1, 0.1])


@st.composite
def weighted_centres(draw):
    n = draw(st.integers(1, 12))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    X = MIXED.sample_unit(n, rng)
    w = rng.random(n) + 1e-3
    return X, w, seed


@settings(max_examples=40, deadline=None)
@given(weighted_centres(), st.sampled_from(["scott", "silverman", 0.5]), st.floats(0.0, 3.0))
def test_samples_are_valid_configs_with_finite_density(data, rule, shrink):
    # reference: Space.validate (the space's own definition of a valid config)
    X, w, seed = data
    kde = MixedKDE(MIXED, X, w, bandwidth=rule, shrink=shrink)
    S = kde.sample(20, np.random.default_rng(seed))
    for config in MIXED.decode(S):
        MIXED.validate(config)
    np.testing.assert_array_equal(np.isnan(S), ~MIXED.active_mask(S))
    assert np.isfinite(kde.logpdf(S)).all()


def test_a_stack_of_densities_equals_each_one_evaluated_alone():
    # reference: MixedKDE.logpdf of every density of the stack, one by one
    space = Space.from_dict({"params": {
        "a": {"type": "real", "low": 0.0, "high": 1.0},
        "n": {"type": "integer", "low": 1, "high": 50, "log": True},
        "k": {"type": "choice", "choices": ["x", "y", "z"]},
        "g": {"type": "real", "low": 1e-3, "high": 1.0, "log": True, "when": {"k": ["y"]}},
    }})
    rng = np.random.default_rng(0)
    kdes = [MixedKDE(space, space.sample_unit(n, rng), weights=rng.random(n) + 0.1, shrink=s)
            for n, s in ((1, 0.0), (5, 1.0), (17, 2.0))]
    from warmstart.search.kde import KDEStack as Stack

    X = space.sample_unit(40, rng)
    got = Stack(kdes).logpdf(X)
    want = np.column_stack([k.logpdf(X) for k in kdes])
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-10)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.0, 5.0), min_size=1, max_size=40).filter(lambda w: sum(w) > 0),
       st.integers(0, 50), st.integers(0, 2**32 - 1))
def test_picked_centres_are_numpys_weighted_choice(weights, n, seed):
    # reference: numpy.random.Generator.choice(n_centres, size=n, p=weights), the same
    # random stream gives the same indices (pick only skips choice's checks of p)
    space = real_space(1)
    centres = np.linspace(0.0, 1.0, len(weights))[:, None]
    kde = MixedKDE(space, centres, weights)
    expected = np.random.default_rng(seed).choice(len(weights), size=n, p=kde.weights)
    rng = np.random.default_rng(seed)
    np.testing.assert_array_equal(kde.pick(n, rng), expected)
    np.testing.assert_array_equal(kde.pick(n, rng), np.random.default_rng(seed).choice(
        len(weights), size=2 * n, p=kde.weights)[n:])  # the cumulative weights kept for the next call
