"""Gain in bits: analytic cases and reference implementations."""

import itertools
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.stats import wilcoxon

from warmstart.gain.bits import (
    GainError,
    Runs,
    bits,
    bits_interval,
    compare,
    hit_rate,
    hits_and_regret,
    in_target,
    pool,
    target_threshold,
)


def test_always_hitting_search_scores_log2_one_over_p():
    # analytic: q = 1, so active information is log2(1/p)
    for p in (0.5, 0.05, 1 / 64):
        runs = Runs(np.ones((7, 12), dtype=bool))
        q, smoothed = hit_rate(runs.hits)
        assert q == 1.0 and not smoothed
        assert bits(q, p) == pytest.approx(math.log2(1 / p))
        b, lo, hi = bits_interval(runs, p)
        assert b == pytest.approx(math.log2(1 / p)) and lo == pytest.approx(b) and hi == pytest.approx(b)


def test_uniform_search_scores_zero_bits_within_its_interval():
    # analytic: a uniform search has q = p in expectation, so 0 bits
    rng = np.random.default_rng(1)
    reference = rng.random(20_000)
    thr = target_threshold(reference, 0.05)
    p = float(in_target(reference, thr).mean())
    covered, estimates = 0, []
    for _ in range(100):
        draws = rng.random((60, 20))
        b, lo, hi = bits_interval(Runs(in_target(draws, thr)), p, rng=rng, n_boot=500)
        covered += lo <= 0 <= hi
        estimates.append(b)
    assert covered >= 85  # a 95 % interval covers 0 bits in most experiments
    assert abs(np.mean(estimates)) < 0.05  # and the estimates centre on 0


def test_share_of_target_sets_with_b_bits_is_at_most_two_to_minus_b():
    # published bound on active information (from memory): over all target sets of a fixed
    # size k, the share on which a fixed search gains >= b bits is at most 2^-b
    # (it follows from Markov's inequality: the mean of q/p over target sets is 1)
    rng = np.random.default_rng(0)
    n = 10
    for trial in range(5):
        query_probs = rng.dirichlet(np.full(n, 0.3 + trial))  # a fixed search: where its query lands
        for k in (1, 2, 3, 5):
            p = k / n
            sets = list(itertools.combinations(range(n), k))
            gains = np.array([bits(float(query_probs[list(t)].sum()), p) if query_probs[list(t)].sum() > 0
                              else -np.inf for t in sets])
            for b in (0.25, 0.5, 1.0, 2.0, 3.0):
                share = float(np.mean(gains >= b))
                assert share <= 2.0**-b + 1e-12


def test_zero_hits_are_smoothed_and_flagged_never_divided_by_zero():
    none = Runs(np.zeros((5, 10), dtype=bool))
    some = Runs(np.eye(5, 10, dtype=bool))
    q, smoothed = hit_rate(none.hits)
    assert smoothed and q == pytest.approx(0.5 / 51)  # Jeffreys: (0 + 1/2) / (n + 1)
    g = compare("t", none, some, p=0.05)
    assert g.smoothed and math.isfinite(g.gain) and g.gain < 0
    assert math.isinf(none.first_hit()[0])
    with pytest.raises(GainError, match="positive q and p"):
        bits(0.0, 0.05)


def test_target_threshold_keeps_the_top_share():
    # reference: numpy sorting; the target set holds ceil(gamma * n) distinct scores
    s = np.random.default_rng(3).normal(size=1000)
    for gamma in (0.01, 0.05, 0.2):
        thr = target_threshold(s, gamma)
        assert int((s >= thr).sum()) == math.ceil(gamma * 1000)
        thr_min = target_threshold(s, gamma, maximize=False)
        assert int((s <= thr_min).sum()) == math.ceil(gamma * 1000)
    with pytest.raises(GainError, match="gamma"):
        target_threshold(s, 1.5)
    with pytest.raises(GainError, match="no finite score"):
        target_threshold([np.nan], 0.05)


def test_gain_interval_and_verdicts():
    rng = np.random.default_rng(5)
    warm = Runs(rng.random((40, 10)) < 0.4)
    cold = Runs(rng.random((40, 10)) < 0.05)
    g = compare("t", warm, cold, p=0.05, rng=1)
    assert g.verdict == "helped" and g.gain_low > 0
    assert g.gain == pytest.approx(math.log2(warm.hits.mean() / cold.hits.mean()))
    g2 = compare("t", cold, warm, p=0.05, rng=1)
    assert g2.verdict == "hurt" and g2.gain_high < 0
    with pytest.raises(GainError, match="same budget"):
        compare("t", warm, cold.truncate(5), p=0.05)


def test_bootstrap_interval_covers_the_true_rate_most_of_the_time():
    # reference: a Bernoulli process with known rate; a 95 % interval should cover
    # the true bits in roughly 95 % of repeated experiments (we require >= 85 %)
    rng = np.random.default_rng(11)
    true_q, p = 0.2, 0.05
    covered = 0
    for _ in range(200):
        runs = Runs(rng.random((30, 10)) < true_q)
        _, lo, hi = bits_interval(runs, p, rng=rng, n_boot=500)
        covered += lo <= math.log2(true_q / p) <= hi
    assert covered / 200 >= 0.85


def test_pool_matches_scipy_wilcoxon_and_pools_q():
    rng = np.random.default_rng(7)
    results = []
    for i in range(12):
        qw, qc = rng.uniform(0.05, 0.5), rng.uniform(0.02, 0.3)
        results.append(compare(f"t{i}", Runs(rng.random((20, 10)) < qw), Runs(rng.random((20, 10)) < qc), p=0.05, rng=i))
    pooled = pool(results)
    diff = [r.bits_warm - r.bits_cold for r in results]
    assert pooled.wilcoxon_p == pytest.approx(wilcoxon(diff).pvalue)  # reference: scipy.stats.wilcoxon
    assert pooled.gain == pytest.approx(math.log2(np.mean([r.q_warm for r in results]) / np.mean([r.q_cold for r in results])))
    assert pooled.share_hurt == pytest.approx(np.mean([r.gain < 0 for r in results]))
    assert pooled.gain_low <= pooled.gain <= pooled.gain_high


def test_share_hurt_outside_noise_counts_only_unflagged_tasks():
    rng = np.random.default_rng(11)
    results = []
    for i in range(10):
        qw, qc = (0.05, 0.4) if i < 4 else (0.4, 0.05)  # tasks 0-3 are hurt, the rest helped
        r = compare(f"t{i}", Runs(rng.random((30, 10)) < qw), Runs(rng.random((30, 10)) < qc), p=0.05, rng=i)
        r.extra["within_noise"] = i < 3  # three of the four hurt tasks sit within noise
        results.append(r)
    pooled = pool(results)
    assert pooled.share_hurt == pytest.approx(0.4)
    assert pooled.share_hurt_outside_noise == pytest.approx(1 / 7)  # counted by hand: 1 hurt of 7 unflagged
    for r in results:
        del r.extra["within_noise"]
    assert math.isnan(pool(results).share_hurt_outside_noise)  # no flags: nothing to split on


def test_hits_and_regret_by_hand():
    # analytic: reference spans 0 (worst) to 1 (best); threshold 0.8
    scores = np.array([[0.2, np.nan, 0.9, 0.5, 1.0],
                       [np.nan, np.nan, 0.6, 0.7, 0.1]])
    hits, regret = hits_and_regret(scores, 0.8, np.array([0.0, 0.3, 1.0]))
    assert hits.tolist() == [[False, False, True, False, True], [False] * 5]
    np.testing.assert_allclose(regret, [[0.8, 0.8, 0.1, 0.1, 0.0], [1.0, 1.0, 0.4, 0.3, 0.3]])
    # minimising: the same scores read the other way round
    hits, regret = hits_and_regret(scores[:1], 0.3, np.array([0.0, 1.0]), maximize=False)
    assert hits.tolist() == [[True, False, False, False, False]]
    np.testing.assert_allclose(regret, [[0.2, 0.2, 0.2, 0.2, 0.2]])


@given(st.lists(st.floats(-10, 10), min_size=1, max_size=30), st.booleans())
def test_regret_never_rises_stays_in_unit_interval_and_is_zero_at_the_best(values, maximize):
    # invariants of best-so-far regret against a reference that holds the searched scores
    scores = np.array(values)
    hits, regret = hits_and_regret(scores, float(np.median(scores)), scores, maximize)
    assert (np.diff(regret) <= 0).all() and ((0 <= regret) & (regret <= 1)).all()
    assert regret[-1] == 0.0
    assert (hits == in_target(scores, float(np.median(scores)), maximize)).all()


def test_a_list_at_the_uniform_rate_pools_to_zero_bits_though_its_misses_are_smoothed():
    # analytic case (DESIGN.md section 9): a search that hits at the uniform rate p scores 0 bits in
    # expectation. A fixed list runs once (B = 10 queries), so most tasks see no hit; smoothing
    # each miss to 0.5 / 11 (about p) before pooling would lift the pooled figure by some 0.6 bit.
    rng = np.random.default_rng(3)
    p, budget, results = 0.05, 10, []
    for i in range(1000):
        warm = Runs(rng.random((10, budget)) < p)  # cold = warm: the paired test is skipped (fast)
        listed = Runs(rng.random((1, budget)) < p)
        results.append(compare(f"t{i}", warm, warm, p, rng=i, n_boot=10, others={"list": listed}))
    assert any(r.extra["bits_list"] == pytest.approx(math.log2(0.5 / 11 / p)) for r in results)  # per task: smoothed
    pooled = pool(results, n_boot=200)
    # the pooled list's hit count is binomial(1000 * 10, p): 4 standard errors of its log2 are 0.25 bit
    assert abs(pooled.extra["bits_list"]) < 0.25
    assert abs(pooled.bits_warm) < 0.25
    # a task where neither hit does not count as warm doing better
    nothing = compare("none", Runs(np.zeros((10, budget), bool)), Runs(np.zeros((10, budget), bool)), p,
                      others={"list": Runs(np.zeros((1, budget), bool))})
    assert pool([nothing, results[0]], n_boot=50).extra["share_warm_above_list"] <= 0.5
    # no task hit at all: the pooled figure falls back to the smoothed rates, finite
    assert math.isfinite(pool([nothing], n_boot=50).extra["bits_list"])
