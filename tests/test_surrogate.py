"""The Gaussian-process replay objective (warmstart.gain.objectives) and the
surrogate replay, on a published test function and a small DuckDB archive."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.stats import spearmanr

from warmstart.gain.bits import in_target, target_threshold
from warmstart.space import Space
from warmstart.gain.objectives import SurrogateObjective
from warmstart.search.gp import gp_features
from warmstart.search.testfunctions import branin

pytestmark = pytest.mark.usefixtures("one_blas_thread")


def _branin_surrogate(n=64, seed=0):
    f = branin()
    configs = f.space.sobol(n, seed)
    X = f.space.encode(configs)
    values = f.evaluate(np.array([[c["x1"], c["x2"]] for c in configs]))
    # Branin is minimised; a maximised score is its negative
    return f, SurrogateObjective(f.space, X, -values, maximize=True, seed=seed), X, -values


def test_surrogate_ranks_a_published_test_function_like_the_function_itself():
    # reference: Branin-Hoo (Dixon & Szego 1978), evaluated exactly on fresh uniform points
    f, sur, _, _ = _branin_surrogate()
    rows = f.space.sample_unit(2000, np.random.default_rng(7))
    configs = f.space.decode(rows)
    truth = -f.evaluate(np.array([[c["x1"], c["x2"]] for c in configs]))
    rho = spearmanr(sur.values(rows), truth).statistic
    assert rho > 0.95
    # its top 5 % region mostly lies in the function's own top 10 %
    top_sur = in_target(sur.values(rows), target_threshold(sur.reference_scores, 0.05), True)
    top_true = in_target(truth, target_threshold(truth, 0.10), True)
    assert top_sur.sum() > 0 and (top_sur & top_true).sum() / top_sur.sum() > 0.8


def test_surrogate_keeps_to_the_recorded_range_and_order():
    f, sur, X, scores = _branin_surrogate()
    at_recorded = sur.values(X)
    # the copula map never predicts beyond the recorded scores
    rows = f.space.sample_unit(500, np.random.default_rng(3))
    v = sur.values(rows)
    assert v.min() >= scores.min() - 1e-12 and v.max() <= scores.max() + 1e-12
    # on the recorded configs it ranks as they scored (reference: scipy.stats.spearmanr)
    assert spearmanr(at_recorded, scores).statistic > 0.95


def test_uniform_hit_chance_of_the_surrogate_is_gamma():
    # analytic: the threshold is the top-5 % quantile of 4096 uniform draws, so a fresh
    # uniform sample lands above it with probability ~0.05 (binomial sd 0.0034 at n = 4096)
    _, sur, _, _ = _branin_surrogate()
    threshold = target_threshold(sur.reference_scores, 0.05, True)
    assert abs(sur.uniform_hit_chance(threshold, n=4096, rng=11) - 0.05) < 0.02
    assert sur.max_distinct_hits(threshold, 10) == 10


@settings(max_examples=10, deadline=None)
@given(scale=st.floats(0.1, 10.0), shift=st.floats(-5.0, 5.0))
def test_target_set_does_not_move_under_a_monotone_change_of_scores(scale, shift):
    # property: the fit uses ranks only, so an increasing transform of the recorded
    # scores leaves the target region where it was
    f, sur, X, scores = _branin_surrogate(n=40)
    other = SurrogateObjective(f.space, X, np.exp(scores / 100.0) * scale + shift, maximize=True, seed=0)
    rows = f.space.sample_unit(300, np.random.default_rng(5))
    a = in_target(sur.values(rows), target_threshold(sur.reference_scores, 0.1), True)
    b = in_target(other.values(rows), target_threshold(other.reference_scores, 0.1), True)
    assert (a == b).all()


def test_features_of_a_mixed_conditional_space():
    space = Space.from_dict({"params": {
        "kernel": {"type": "choice", "choices": ["rbf", "poly", "linear"]},
        "gamma": {"type": "real", "low": 1e-3, "high": 1.0, "log": True, "when": {"kernel": ["rbf"]}},
        "k": {"type": "integer", "low": 1, "high": 50},
    }})
    configs = [{"kernel": "rbf", "gamma": 0.1, "k": 3}, {"kernel": "linear", "k": 40}]
    X = space.encode(configs)
    F = gp_features(space, X, conditional=np.isnan(X).any(axis=0))
    # 3 indicator columns for kernel, gamma + its "active" flag, k
    assert F.shape == (2, 6)
    assert F[0, :3].tolist() == [1.0, 0.0, 0.0] and F[1, :3].tolist() == [0.0, 0.0, 1.0]
    assert F[0, 4] == 1.0 and F[1, 3] == 0.0 and F[1, 4] == 0.0
    # a surrogate fits and predicts on such a space
    rng = np.random.default_rng(0)
    sample = space.sample(60, rng)
    y = np.array([(c["kernel"] == "rbf") * 1.0 - abs(np.log10(c.get("gamma", 1.0)) + 1) * 0.1 + rng.normal(0, 0.01)
                  for c in sample])
    sur = SurrogateObjective(space, space.encode(sample), y, seed=0)
    best = sur({"kernel": "rbf", "gamma": 0.1, "k": 10})
    assert best > sur({"kernel": "linear", "k": 10})


def test_a_surrogate_needs_scores():
    space = branin().space
    with pytest.raises(ValueError, match="at least 3 finite recorded scores"):
        SurrogateObjective(space, space.sample_unit(2, 0), np.array([1.0, np.nan]))
