"""Starting, resuming and running a study (warmstart.study) on real archive
files in tmp_path.

The objective is the Branin-Hoo function (Dixon & Szego 1978; published
minimum 0.397887, from memory), minimised; the data tables are the fixed-seed
random frame of conftest.py (invented)."""

from __future__ import annotations

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
