"""Starting, resuming and running a study (warmstart.study) on real archive
files in tmp_path.

The objective is the Branin-Hoo function (Dixon & Szego 1978; published
minimum 0.397887, from memory), minimised; the data tables are the fixed-seed
random frame of conftest.py (invented)."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from warmstart.archive import Archive
from warmstart.evaluate.objective import CallableObjective
from warmstart.search.testfunctions import branin
from warmstart.study import resume_study, run_study, start_study, summary

BRANIN = branin()
BRANIN_MINIMUM = 0.397887  # published global minimum (Dixon & Szego 1978), from memory


def _branin(config) -> float:
    """Branin-Hoo written out from its published definition (a, b, c, r, s, t constants)."""
    x1, x2 = config["x1"], config["x2"]
    b, c, t = 5.1 / (4 * math.pi**2), 5 / math.pi, 1 / (8 * math.pi)
    return (x2 - b * x1**2 + c * x1 - 6) ** 2 + 10 * (1 - t) * math.cos(x1) + 10


def _task(archive, frame, name="table"):
    return archive.add_task(name, frame, "y")


def test_a_study_records_every_trial_and_finishes(tmp_path, small_frame):
    with Archive(tmp_path / "a.duckdb") as archive:
        study = start_study(archive, _task(archive, small_frame), "toy", BRANIN.space, metric="branin",
                            maximize=False, seed=1)
        assert study.origin == "cold" and "cold start" in study.note  # nothing to learn from yet
        run = run_study(study, CallableObjective(_branin), 12)
        trials = archive.trials(study.study_id)
        row = archive.study(study.study_id)
        out = summary(study, run)
    assert not run.interrupted and len(run.trials) == 12 and run.n_failed == 0
    assert trials["number"].tolist() == list(range(1, 13)) and (trials["status"] == "ok").all()
    for config, score in zip(trials["config"], trials["score"]):
        assert score == pytest.approx(_branin(config), rel=1e-12)
    assert trials["score"].min() >= BRANIN_MINIMUM - 1e-6  # nothing beats the published minimum
    assert trials["cost_s"].notna().all() and trials["started_at"].notna().all()
    assert not pd.isna(row["finished_at"]) and row["origin"] == "cold"
    assert out["trial_count"] == 12 and out["best_score"] == pytest.approx(trials["score"].min())


def test_failed_trials_keep_their_error_text(tmp_path, small_frame):
    def fragile(config):
        if config["x1"] > 2.5:
            raise ValueError(f"diverged at x1 = {config['x1']:.2f}")
        return _branin(config)

    with Archive(tmp_path / "a.duckdb") as archive:
        study = start_study(archive, _task(archive, small_frame), "toy", BRANIN.space, maximize=False, seed=0)
        run = run_study(study, CallableObjective(fragile), 10)
        trials = archive.trials(study.study_id)
    failed = trials[trials["status"] == "failed"]
    assert run.n_failed == len(failed) > 0
    assert failed["error"].str.match(r"^ValueError: diverged at x1 = ").all()
    assert failed["score"].isna().all()
    assert sum(run.failures.values()) == run.n_failed


def test_resume_feeds_the_recorded_trials_and_repeats_its_proposals(tmp_path, small_frame):
    path = tmp_path / "a.duckdb"
    with Archive(path) as archive:
        study = start_study(archive, _task(archive, small_frame), "toy", BRANIN.space, maximize=False, seed=3)
        run_study(study, CallableObjective(_branin), 7)
    with Archive(path, read_only=True) as archive:
        first = resume_study(archive, study.study_id)
        second = resume_study(archive, study.study_id)
        assert first.search.trial_count == 7
        assert first.search.best.score == pytest.approx(archive.study(study.study_id)["best_score"])
        assert first.search.propose(3) == second.search.propose(3)


def test_ctrl_c_keeps_the_finished_trials_and_leaves_the_study_open(tmp_path, small_frame):
    calls = []

    def interrupting(config):
        calls.append(config)
        if len(calls) == 4:
            raise KeyboardInterrupt
        return _branin(config)

    with Archive(tmp_path / "a.duckdb") as archive:
        study = start_study(archive, _task(archive, small_frame), "toy", BRANIN.space, maximize=False)
        run = run_study(study, interrupting, 10)
        assert run.interrupted and len(run.trials) == 3
        assert len(archive.trials(study.study_id)) == 3
        assert pd.isna(archive.study(study.study_id)["finished_at"])
        assert np.isfinite(archive.trials(study.study_id)["score"]).all()


# -- a warm study keeps the prior it started with ------------------------------------------
from sklearn.datasets import load_breast_cancer, load_iris, load_wine  # noqa: E402

from warmstart.space import Space  # noqa: E402

TOY = Space.from_dict({"params": {"x": {"type": "real", "low": 0.0, "high": 1.0},
                                  "k": {"type": "integer", "low": 1, "high": 64, "log": True}}})


def _history(archive, name, frame, best_x, seed):
    """A past study of learner 'toy' whose invented scores peak at x = best_x."""
    rng = np.random.default_rng(seed)
    x, k = rng.random(24), rng.integers(1, 65, 24)
    scores = 1 - (x - best_x) ** 2 - 0.05 * (np.log2(k) - 3) ** 2
    task = archive.add_task(name, frame, "target")
    study = archive.add_study(task, "toy", TOY, metric="score")
    archive.add_trials(study, pd.DataFrame({"x": x, "k": k, "score": scores}))
    return study


def _same_prior(a, b) -> bool:
    """Equal priors: every number of their plain-data form (the space compared by
    content: the archive's copy also carries the learner's label)."""
    da, db = a.to_dict(), b.to_dict()
    return a.space.content_hash == b.space.content_hash and {**da, "space": None} == {**db, "space": None}


def _resample(loader, seed):
    return loader(as_frame=True).frame.sample(frac=1.0, replace=True, random_state=seed).reset_index(drop=True)


@pytest.fixture
def warm(tmp_path):
    """An archive with two past studies and a warm study on a third table
    (scikit-learn's bundled datasets; scores invented)."""
    path = tmp_path / "a.duckdb"
    with Archive(path) as archive:
        _history(archive, "iris", load_iris(as_frame=True).frame, 0.2, 1)
        _history(archive, "wine", load_wine(as_frame=True).frame, 0.3, 2)
        task = archive.add_task("cancer", load_breast_cancer(as_frame=True).frame, "target")
        study = start_study(archive, task, "toy", TOY, seed=0)
        assert study.origin == "warm"
        record = archive.study(study.study_id)["prior"]
        for seed in (5, 6):  # teammates add close relatives of the task, with other best configs
            _history(archive, f"cancer resample {seed}", _resample(load_breast_cancer, seed), 0.9, seed)
    return path, study, record


def test_the_stored_recipe_rebuilds_the_same_prior_whatever_was_added(warm):
    path, study, record = warm
    started = study.search.prior
    assert [s["task"] for s in record["recipe"]["sources"]] == ["iris", "wine"]
    assert {"digest", "task_fingerprint", "created_at", "trial_count", "similarity"} <= set(record["recipe"]["sources"][0])
    assert "centres" not in record and len(json.dumps(record)) < 4000  # a few hundred bytes per source
    with Archive(path, read_only=True) as archive:
        resumed = resume_study(archive, study.study_id)
        today = archive.build_prior(archive.profile_of(study_id_task(archive, study)), "toy", TOY,
                                    exclude_tasks=[study_id_task(archive, study)])
    assert _same_prior(resumed.search.prior, started)
    assert "it started with" in resumed.note and "not as recorded" not in resumed.note
    assert len(today.sources) == 4  # today's archive would give another prior


def study_id_task(archive, study) -> int:
    return int(archive.study(study.study_id)["task_id"])


def _set_record(path, study_id, record):
    with Archive(path) as archive:  # what an older warmstart, or a merge, left in the studies table
        archive.con.execute("UPDATE studies SET prior = ? WHERE study_id = ?", [json.dumps(record), study_id])


def test_a_study_recorded_by_an_older_warmstart_rebuilds_from_the_studies_it_lists(warm):
    path, study, record = warm
    older = {k: v for k, v in record.items() if k != "recipe"}
    older["centres"] = study.search.prior.provenance["centres"]  # the old record: provenance + n_seeds
    _set_record(path, study.study_id, older)
    with Archive(path, read_only=True) as archive:
        resumed = resume_study(archive, study.study_id)
    assert _same_prior(resumed.search.prior, study.search.prior)
    assert "older warmstart" in resumed.note


def test_a_renumbered_source_is_found_by_its_identity(warm):
    path, study, record = warm
    moved = json.loads(json.dumps(record))
    moved["recipe"]["sources"][0]["study_id"] = 4  # a merge gave the source another id; 4 is another study
    _set_record(path, study.study_id, moved)
    with Archive(path, read_only=True) as archive:
        resumed = resume_study(archive, study.study_id)
    assert _same_prior(resumed.search.prior, study.search.prior)


def test_sources_changed_since_are_named_in_the_note(warm):
    path, study, record = warm
    first = record["recipe"]["sources"][0]
    with Archive(path) as archive:  # a curation step deleted two of its trials
        archive.con.execute("DELETE FROM trials WHERE study_id = ? AND number <= 2", [first["study_id"]])
        resumed = resume_study(archive, study.study_id)
        assert f"study {first['study_id']} (iris) has 22 of the 24 successful trials it had" in resumed.note
        archive.con.execute("DELETE FROM trials")
        gone = resume_study(archive, study.study_id)
    assert "rebuilt from today's archive" in gone.note and gone.search.prior is None


def test_a_warm_study_runs_the_mixture_and_a_resumed_one_proposes_the_same(warm):
    from warmstart.search.mixture import MixtureSearch

    path, study, record = warm
    assert isinstance(study.search, MixtureSearch)
    assert record["search"]["kind"] == "mixture" and record["search"]["seed"] == 0
    assert record["search"]["options"] == study.search.options

    def objective(config):  # the invented toy landscape of _history, peaking at x = 0.25
        return 1 - (config["x"] - 0.25) ** 2 - 0.05 * (np.log2(config["k"]) - 3) ** 2

    with Archive(path) as archive:
        uninterrupted = resume_study(archive, study.study_id)
        run_study(uninterrupted, objective, 5)
        then = uninterrupted.search.propose(2)
    with Archive(path, read_only=True) as archive:  # the same study rebuilt from the archive
        resumed = resume_study(archive, study.study_id)
        assert isinstance(resumed.search, MixtureSearch) and resumed.search.trial_count == 5
        assert resumed.search.propose(2) == then
