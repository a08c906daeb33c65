"""The prior: density where neighbors were good, alignment, JSON, re-weighting,
and the negative-transfer guard of the warm search."""

import json
import math

import numpy as np
import pytest

from warmstart.gain.bits import in_target, target_threshold
from warmstart.prior import Prior, PriorError, Source, prior_from_sources, within_study_quantiles
from warmstart.search.density import DensitySearch
from warmstart.space import Space

SPACE = Space.from_dict({"params": {
    "x": {"type": "real", "low": 0.0, "high": 1.0},
    "y": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    "z": {"type": "real", "low": -5.0, "high": 5.0},
    "w": {"type": "real", "low": 0.0, "high": 1.0},
    "v": {"type": "real", "low": 0.0, "high": 1.0},
    "r": {"type": "integer", "low": 1, "high": 64, "log": True},
    "kind": {"type": "choice", "choices": ["a", "b", "c"]},
    "depth": {"type": "integer", "low": 1, "high": 8, "when": {"kind": ["b", "c"]}},
}})


def objective(config, setting):
    """Synthetic family (invented test function): the optimum moves with the task setting."""
    u = SPACE.encode([config])[0]
    centre = np.array([setting, 1 - setting, 0.5 + 0.4 * (setting - 0.5), setting ** 2, 0.3, 1 - setting ** 2])
    d = u[:6] - centre
    value = -float(np.sum(10 * d**2 - np.cos(6 * np.pi * d)))  # a shifted Rastrigin-like bowl: many local optima
    value += 0.05 if config["kind"] == ("a" if setting < 0.5 else "c") else 0.0
    if "depth" in config:
        value -= 0.01 * abs(config["depth"] - 4)
    return value


def source(study_id, setting, n=256, seed=0, similarity=1.0):
    configs = SPACE.sobol(n, seed)
    scores = np.array([objective(c, setting) for c in configs])
    return Source(study_id=study_id, task_id=study_id, task=f"task {study_id}", X=SPACE.encode(configs),
                  quantile=within_study_quantiles(scores), numbers=np.arange(1, n + 1),
                  clipped=np.zeros(n, dtype=bool), similarity=similarity, distance=float(study_id))


def test_within_study_quantiles_follow_rank_order():
    # reference: scipy.stats.rankdata semantics (ties share the mean rank)
    q = within_study_quantiles([3.0, 1.0, 2.0, 2.0])
    assert q.tolist() == pytest.approx([0.875, 0.125, 0.5, 0.5])
    assert within_study_quantiles([3.0, 1.0], maximize=False).tolist() == pytest.approx([0.25, 0.75])


def test_prior_puts_density_where_neighbors_were_good_and_samples_are_valid():
    prior = prior_from_sources(SPACE, [source(i, 0.8, seed=i) for i in range(1, 6)])
    near = {"x": 0.8, "y": 10 ** (-3 + 6 * 0.2), "z": 1.2, "w": 0.64, "v": 0.3, "r": 5, "kind": "c", "depth": 4}
    far = {"x": 0.05, "y": 900.0, "z": -4.5, "w": 0.01, "v": 0.95, "r": 60, "kind": "a"}
    lp = prior.logpdf([near, far])
    assert lp[0] > lp[1] + 2.0
    for config in prior.sample(300, np.random.default_rng(0)):
        SPACE.validate(config)  # bounds, integers, choices and conditions respected
    best = prior.seeds[0]
    assert abs(SPACE.encode([best])[0][0] - 0.8) < 0.2


def test_json_round_trip_is_identical(tmp_path):
    prior = prior_from_sources(SPACE, [source(1, 0.3), source(2, 0.7, seed=1, similarity=0.5)],
                               provenance={"learner": "toy"})
    path = tmp_path / "prior.json"
    prior.save(str(path))
    back = Prior.load(str(path))
    configs = SPACE.sample(50, 1)
    assert np.allclose(back.logpdf(configs), prior.logpdf(configs))
    assert back.seeds == prior.seeds
    assert back.provenance == prior.provenance
    assert back.strength == prior.strength
    assert json.loads(back.to_json()) == json.loads(prior.to_json())
    with pytest.raises(PriorError, match="not a warmstart prior"):
        Prior.from_json('{"format": "other"}')


def test_provenance_names_studies_trials_and_weights():
    prior = prior_from_sources(SPACE, [source(1, 0.3, similarity=3.0), source(2, 0.7, seed=1, similarity=1.0)])
    prov = prior.provenance
    assert [n["study_id"] for n in prov["neighbors"]] == [1, 2]
    assert prov["neighbors"][0]["weight"] == pytest.approx(0.75)
    assert sum(c["weight"] for c in prov["centres"]) == pytest.approx(1.0)
    assert {c["study_id"] for c in prov["centres"]} == {1, 2}
    assert "strength" in prior.summary()


def test_reweight_trusts_the_source_whose_ranking_agrees():
    right, wrong = source(1, 0.2), source(2, 0.9, seed=1)
    prior = prior_from_sources(SPACE, [right, wrong])
    assert prior.weights == pytest.approx([0.5, 0.5])
    configs = SPACE.sample(8, 3)
    y = np.array([objective(c, 0.2) for c in configs])
    after = prior.reweight(SPACE.encode(configs), y, maximize=True)
    assert after.weights[0] > 0.8
    assert prior.weights == pytest.approx([0.5, 0.5])  # the original is unchanged


def test_no_usable_source_is_a_clear_error():
    empty = Source(1, 1, "t", np.empty((0, SPACE.dim)), np.empty(0), np.empty(0), np.empty(0, dtype=bool))
    with pytest.raises(PriorError, match="successful trial"):
        prior_from_sources(SPACE, [empty])


def _hit_rate(prior, setting, seeds=40, budget=20):
    rng = np.random.default_rng(99)
    reference = np.array([objective(c, setting) for c in SPACE.sample(20_000, rng)])
    thr = target_threshold(reference, 0.05)
    p = float(in_target(reference, thr).mean())
    hits = []
    for seed in range(seeds):
        search = DensitySearch(SPACE, prior=prior, seed=seed)
        for _ in range(budget):
            config = search.propose()
            value = objective(config, setting)
            search.record(config, value)
            hits.append(value >= thr)
    return float(np.mean(hits)), p


def test_guard_correct_prior_gains_bits_misleading_prior_costs_little():
    # synthetic family where the optimum moves with a task setting (issue 5);
    # bits = log2(q / p) with q the per-query hit rate on the top-5 % target set
    setting = 0.75
    # correct: past tasks of (nearly) the same setting, each with its own sample of configs
    correct = prior_from_sources(SPACE, [source(i, setting + d, seed=i) for i, d in
                                         enumerate((0.0, 0.0, 0.01, -0.01), start=1)])
    # misleading: past tasks whose optimum sits far away
    misleading = prior_from_sources(SPACE, [source(i, 0.05 + d, seed=i) for i, d in
                                            enumerate((0.0, 0.02, 0.04, 0.06), start=1)])
    q_cold, p = _hit_rate(None, setting)
    q_good, _ = _hit_rate(correct, setting)
    q_bad, _ = _hit_rate(misleading, setting)
    smooth = lambda q: max(q, 0.5 / 801)  # Jeffreys smoothing for 40 x 20 queries
    gain_good = math.log2(smooth(q_good) / smooth(q_cold))
    gain_bad = math.log2(smooth(q_bad) / smooth(q_cold))
    assert gain_good >= 2.0, (q_good, q_cold)
    assert gain_bad >= -0.5, (q_bad, q_cold)
