"""Fixed lists (warmstart.search.static): the list strategy runs through the one loop,
and the two static orders match brute-force references (plain sorting in Python)."""

import numpy as np
import pytest

from warmstart.errors import SpaceError
from warmstart.prior import Source, prior_from_sources, within_study_quantiles
from warmstart.search.static import FixedListSearch, average_rank_list, nearest_tasks_list
from warmstart.search.strategy import SearchError, run_search
from warmstart.space import Space

SPACE = Space.from_dict({"params": {
    "a": {"type": "real", "low": 0.0, "high": 1.0},
    "c": {"type": "choice", "choices": ["x", "y"]},
}})
CONFIGS = SPACE.sobol(12, 4)


def _source(i, scores, distance=float("nan"), configs=CONFIGS):
    n = len(configs)
    return Source(study_id=i, task_id=i, task=f"past {i}", X=SPACE.encode(configs),
                  quantile=within_study_quantiles(scores), numbers=np.arange(n), clipped=np.zeros(n, bool),
                  distance=distance)


def test_a_fixed_list_is_proposed_in_order_through_run_search_and_then_refuses():
    search = FixedListSearch(SPACE, CONFIGS[:5])
    result = run_search(search, lambda c: c["a"], 5)
    assert result.configs == CONFIGS[:5]
    assert [t.source for t in result.trials] == ["list"] * 5
    assert search.remaining == 0
    with pytest.raises(SearchError, match=r"fixed list of 5 config\(s\) is used up; .* at most 5 trial\(s\)"):
        search.propose()


def test_a_fixed_list_proposes_repeats_and_batches():
    search = FixedListSearch(SPACE, [CONFIGS[0], CONFIGS[0], CONFIGS[1]])
    assert search.propose(2) == [CONFIGS[0], CONFIGS[0]] and search.n_pending == 2
    assert search.propose() == CONFIGS[1]


def test_a_fixed_list_refuses_an_invalid_config():
    with pytest.raises(SpaceError, match="'c'"):
        FixedListSearch(SPACE, [{"a": 0.5, "c": "z"}])


def test_average_rank_list_sorts_by_the_unweighted_mean_quantile():
    rng = np.random.default_rng(0)
    sources = [_source(i, rng.normal(size=12)) for i in range(3)]
    sources[0].similarity = 50.0  # weights must not matter to the average rank
    prior = prior_from_sources(SPACE, sources, top_fraction=1.0)  # every config is a candidate
    # brute-force reference: mean quantile per config, sorted by Python (stable, best first)
    mean_q = np.mean([s.quantile for s in sources], axis=0)
    expected = [CONFIGS[i] for i in sorted(range(12), key=lambda i: -mean_q[i])]
    listed = average_rank_list(prior, 12)
    assert [SPACE.encode([c])[0].tolist() for c in listed] == [SPACE.encode([c])[0].tolist() for c in expected]
    assert len(average_rank_list(prior, 4)) == 4 and len(average_rank_list(prior, 40)) == 12


def test_nearest_tasks_list_takes_each_studys_best_in_order_of_distance_then_the_next():
    scores_far = np.arange(12.0)  # best: config 11, then 10, ...
    scores_near = -np.arange(12.0)  # best: config 0, then 1, ...
    prior = prior_from_sources(SPACE, [_source(1, scores_far, distance=2.0), _source(2, scores_near, distance=0.5)])
    listed = nearest_tasks_list(prior, 5)
    # by hand: nearest's best (0), far's best (11), nearest's second (1), far's second (10), then 2
    assert listed == [CONFIGS[i] for i in (0, 11, 1, 10, 2)]
    # a config both studies rank first appears once
    same = prior_from_sources(SPACE, [_source(1, scores_far, 1.0), _source(2, scores_far, 2.0)])
    assert nearest_tasks_list(same, 3) == [CONFIGS[i] for i in (11, 10, 9)]
    assert len(nearest_tasks_list(same, 50)) == 12  # the distinct configs run out


def test_list_lengths_are_checked():
    prior = prior_from_sources(SPACE, [_source(1, np.arange(12.0))])
    with pytest.raises(SearchError, match="n must be a whole number >= 0, got -1"):
        average_rank_list(prior, -1)
