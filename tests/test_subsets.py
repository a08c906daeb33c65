"""Densities of many subsets at once (warmstart.search.subsets) against the
one-density-at-a-time reference, :class:`warmstart.search.kde.MixedKDE`
(itself checked against scipy.stats.gaussian_kde and scikit-learn's
KernelDensity in test_kde.py), and the mixture search's out-of-sample own
model against the fold-by-fold loop it replaced.

Spaces mix every kind of parameter, conditions and single-level choices;
rows are random draws with fixed seeds (no data).
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from warmstart.prior import Source, prior_from_sources, within_study_quantiles
from warmstart.search.kde import MixedKDE, uniform_logpdf
from warmstart.search.mixture import MixtureSearch
from warmstart.search.subsets import subset_bandwidths, subset_logpdf
from warmstart.space import Space

MIXED = Space.from_dict({"params": {
    "x": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    "kind": {"type": "choice", "choices": ["a", "b", "c"]},
    "n": {"type": "integer", "low": 1, "high": 8, "when": {"kind": ["a", "b"]}},
    "flag": {"type": "choice", "choices": [True, False], "when": {"kind": ["c"]}},
    "only": {"type": "choice", "choices": ["one"]},
    "u": {"type": "real", "low": -1.0, "high": 1.0},
}})
PLAIN = Space.from_dict({"params": {"a": {"type": "real", "low": 0, "high": 1},
                                    "b": {"type": "integer", "low": 0, "high": 3}}})


def _rows(space: Space, n: int, seed: int) -> np.ndarray:
    rows = space.encode(space.sample(n, rng=seed))
    rows[: n // 4] = rows[0]  # repeated configs, as a search records them
    return rows


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 40), subsets=st.integers(1, 8),
       shrink=st.sampled_from([0.0, 1.0, 2.0]), mixed=st.booleans())
def test_every_subset_equals_its_own_mixed_kde(seed, n, subsets, shrink, mixed):
    space = MIXED if mixed else PLAIN
    rng = np.random.default_rng(seed)
    X = _rows(space, n, seed)
    members = rng.random((subsets, n)) < rng.uniform(0.2, 1.0)
    members[np.arange(subsets), rng.integers(0, n, subsets)] = True  # none empty
    queries = np.concatenate([rng.integers(0, n, 3) for _ in range(subsets)])
    of = np.repeat(np.arange(subsets), 3)
    got = subset_logpdf(space, X, members, queries, of, shrink=shrink)
    H = subset_bandwidths(space, X, members, shrink=shrink)
    for k in range(subsets):
        ref = MixedKDE(space, X[members[k]], shrink=shrink)
        np.testing.assert_allclose(H[k], ref.bandwidths, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(got[of == k], ref.logpdf(X[queries[of == k]]), rtol=1e-9, atol=1e-12)


def _loop_out_of_sample(search: MixtureSearch, rows: np.ndarray, y: np.ndarray) -> np.ndarray:
    """The fold-by-fold computation (one MixedKDE per fold and set), as it was written before."""
    n = rows.shape[0]
    folds = np.arange(n) % min(n, 20)
    out = np.full(n, np.nan)
    lu = uniform_logpdf(search.space, rows)
    for f in range(min(n, 20)):
        test = folds == f
        good, rest = search._own_densities(rows[~test], y[~test])
        if good is None:
            continue
        lg = good.logpdf(rows[test])
        lr = lu[test] if rest is None else rest.logpdf(rows[test])
        out[test] = lg - lr
    return out


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 45), failed=st.floats(0.0, 0.6), mixed=st.booleans())
def test_out_of_sample_own_model_equals_the_fold_by_fold_loop(seed, n, failed, mixed):
    space = MIXED if mixed else PLAIN
    rng = np.random.default_rng(seed)
    X = space.encode(space.sample(32, rng=seed + 1))
    source = Source(1, 1, "past", X, within_study_quantiles(rng.normal(size=32), maximize=True),
                    numbers=np.arange(32), clipped=np.zeros(32, dtype=bool))
    search = MixtureSearch(space, prior_from_sources(space, [source]), seed=0)
    rows = _rows(space, n, seed)
    y = rng.normal(size=n)
    y[rng.random(n) < failed] = np.nan
    y[: n // 5] = np.round(y[: n // 5])  # ties among the scores
    got = search._own_out_of_sample(rows, y)
    ref = _loop_out_of_sample(search, rows, y)
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    ok = ~np.isnan(ref)
    np.testing.assert_allclose(got[ok], ref[ok], rtol=1e-9, atol=1e-9)
    assert math.isnan(got[0]) == (np.isnan(y[np.arange(n) % min(n, 20) != 0]).all())
