"""Verdicts of warm against cold: Holm correction, Wilson interval, paired test.

References: scipy.stats.binomtest(...).proportion_ci(method="wilson") for the
Wilson interval; scipy.stats.wilcoxon for the paired test; Holm's procedure by
its definition (Holm 1979) worked by hand and against a brute-force check of
its family-wise error rate on uniform p-values.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from warmstart.gain.verdicts import holm, paired_runs_p, verdicts, wilson_interval


def test_holm_worked_example():
    # by hand: sorted 0.005, 0.01, 0.03, 0.04 times 4, 3, 2, 1 -> 0.02, 0.03, 0.06, 0.04 -> running max
    assert holm([0.01, 0.04, 0.03, 0.005]) == pytest.approx([0.03, 0.06, 0.06, 0.02])
    assert holm([0.5, 0.9]) == pytest.approx([1.0, 1.0])  # capped at 1
    out = holm([0.01, float("nan"), 0.02])
    assert math.isnan(out[1]) and out[[0, 2]] == pytest.approx([0.02, 0.02])


def test_holm_controls_the_familywise_error_rate():
    # every null true, p-values uniform: P(any adjusted p < 0.05) <= 0.05 (plus sampling slack)
    rng = np.random.default_rng(0)
    p = rng.random((4000, 10))
    rejected = np.array([(holm(row) < 0.05).any() for row in p])
    assert rejected.mean() <= 0.05 + 3 * math.sqrt(0.05 * 0.95 / 4000)


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 200), st.data())
def test_wilson_interval_matches_scipy(n, data):
    k = data.draw(st.integers(0, n))
    ref = stats.binomtest(k, n).proportion_ci(method="wilson")
    low, high = wilson_interval(k, n)
    assert low == pytest.approx(ref.low, abs=1e-12) and high == pytest.approx(ref.high, abs=1e-12)


def test_wilson_interval_bad_input():
    assert all(math.isnan(v) for v in wilson_interval(0, 0))
    with pytest.raises(ValueError, match="k must lie in 0..n=5, got 6"):
        wilson_interval(6, 5)


def test_paired_runs_p_matches_scipy_wilcoxon():
    rng = np.random.default_rng(1)
    warm = rng.random((30, 10)) < 0.4
    cold = rng.random((30, 10)) < 0.2
    d = warm.sum(axis=1) - cold.sum(axis=1)
    assert paired_runs_p(warm, cold) == pytest.approx(stats.wilcoxon(d.astype(float)).pvalue)
    assert paired_runs_p(warm, warm) == 1.0
    assert math.isnan(paired_runs_p(warm[:1], cold[:1]))


def test_verdicts_count_wins_ties_losses_and_significant_losses():
    tasks = ["a", "b", "c", "d", "e"]
    gains = [0.5, 0.05, -0.05, -0.8, -0.3]
    p = [0.001, 0.9, 0.8, 0.001, 0.2]
    v = verdicts(tasks, gains, p)
    assert (v.wins, v.ties, v.losses) == (1, 2, 2)
    assert v.share_loss == pytest.approx(0.4)
    ref = stats.binomtest(2, 5).proportion_ci(method="wilson")
    assert (v.share_loss_low, v.share_loss_high) == pytest.approx((ref.low, ref.high))
    # Holm: 0.001 * 5 = 0.005 and 0.001 * 4 -> 0.005: task d is a significant loss, a is a win
    assert v.significant_losses == 1
    assert [r["task"] for r in v.per_task if r["hurt"]] == ["d"]
    assert "win/tie/loss 1/2/2" in v.summary()
    with pytest.raises(ValueError, match="one entry per task"):
        verdicts(tasks, gains[:2], p)
