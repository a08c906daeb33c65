"""A trial's result travels whole from the objective to the archive: score,
status, the objective's own cost, its error text and per-fold scores; and an
archive written before trials kept fold scores opens and keeps working.

Data: scikit-learn's bundled iris table; other numbers are invented."""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sklearn.datasets import load_iris

from warmstart.archive import SCHEMA_VERSION, Archive
from warmstart.cli import main
from warmstart.errors import ArchiveError
from warmstart.evaluate.result import TrialResult, utc_now
from warmstart.space import Space
from warmstart.study import run_study, start_study

SPACE = Space.from_dict({"params": {"x": {"type": "real", "low": 0.0, "high": 1.0}}})


def _iris_csv(tmp_path) -> str:
    path = tmp_path / "iris.csv"
    load_iris(as_frame=True).frame.to_csv(path, index=False)
    return str(path)


@pytest.mark.parametrize("workers", ["1", "2"])
def test_tune_records_each_trials_fold_scores(tmp_path, workers):
    """With 3-fold CV each trial keeps its three fold scores, whose mean is its
    score, whether evaluated here or in worker processes."""
    archive = str(tmp_path / "a.duckdb")
    res = CliRunner().invoke(main, ["--archive", archive, "tune", _iris_csv(tmp_path), "--target", "target",
                                    "--learner", "knn", "--budget", "3", "--cv", "3", "--workers", workers])
    assert res.exit_code == 0, res.output
    with Archive(archive, read_only=True) as a:
        trials = a.trials(1)
    assert len(trials) == 3 and (trials["status"] == "ok").all()
    for folds, score in zip(trials["fold_scores"], trials["score"]):
        assert len(folds) == 3 and all(0 <= f <= 1 for f in folds)  # accuracy per fold
        assert np.mean(folds) == pytest.approx(score, rel=1e-12)


def test_the_objectives_own_cost_and_error_text_reach_the_archive(tmp_path, small_frame):
    """What the objective reports is what is recorded: its cost (not the
    loop's wall time), its fold scores and its error text, unprefixed."""
    def objective(config):
        now = utc_now()
        if config["x"] > 0.5:
            return TrialResult(None, "failed", 7.25, "out of memory on the training node", now, now)
        folds = (config["x"], config["x"] + 0.5)
        return TrialResult(float(np.mean(folds)), "ok", 12.5, None, now, now, folds)

    with Archive(tmp_path / "a.duckdb") as archive:
        study = start_study(archive, archive.add_task("t", small_frame, "y"), "toy", SPACE, seed=4)
        run = run_study(study, objective, 8)
        trials = archive.trials(study.study_id)
    ok, failed = trials[trials["status"] == "ok"], trials[trials["status"] == "failed"]
    assert len(ok) and len(failed) and run.n_failed == len(failed)
    assert (ok["cost_s"] == 12.5).all() and (failed["cost_s"] == 7.25).all()
    assert (failed["error"] == "out of memory on the training node").all()
    assert run.failures == {"out of memory on the training node": len(failed)}
    for config, folds in zip(ok["config"], ok["fold_scores"]):
        assert list(folds) == pytest.approx([config["x"], config["x"] + 0.5])
    assert failed["fold_scores"].isna().all()
    assert [t.fold_scores for t in run.trials if t.status == "ok"] == [tuple(f) for f in ok["fold_scores"]]


def test_record_refuses_fold_scores_that_are_not_finite_numbers(tmp_path, small_frame):
    with Archive(tmp_path / "a.duckdb") as archive:
        study = archive.add_study(archive.add_task("t", small_frame, "y"), "toy", SPACE)
        with pytest.raises(ArchiveError, match=r"trial of study 1: fold_scores must be finite numbers, got \[0.5, nan\]"):
            archive.record_trial(study, {"x": 0.5}, 0.5, fold_scores=[0.5, float("nan")])
        with pytest.raises(ArchiveError, match="fold_scores must be a list of numbers, got 'high'"):
            archive.record_trial(study, {"x": 0.5}, 0.5, fold_scores="high")
        assert archive.trials(study).empty  # nothing half-written


def test_an_archive_from_before_fold_scores_is_migrated_and_keeps_its_trials(tmp_path, small_frame):
    path = tmp_path / "old.duckdb"
    with Archive(path) as archive:
        study = archive.add_study(archive.add_task("t", small_frame, "y"), "toy", SPACE)
        archive.add_trials(study, pd.DataFrame({"x": [0.1, 0.2, 0.3], "score": [0.5, 0.6, 0.7]}))
    con = duckdb.connect(str(path))  # make it what version 2 wrote: no fold_scores, no version-3 row
    con.execute("ALTER TABLE trials DROP COLUMN fold_scores")
    con.execute("DELETE FROM schema_version WHERE version = 3")
    con.close()
    with Archive(path, read_only=True) as archive:  # a reader sees the trials, without fold scores
        assert archive.schema_version == 2
        assert archive.trials(study)["fold_scores"].isna().all()
    with Archive(path) as archive:
        assert archive.schema_version == SCHEMA_VERSION == 3
        trials = archive.trials(study)
        assert trials["score"].tolist() == [0.5, 0.6, 0.7] and trials["fold_scores"].isna().all()
        archive.record_trial(study, {"x": 0.4}, 0.8, fold_scores=[0.75, 0.85])
        assert list(archive.trials(study)["fold_scores"].iloc[-1]) == [0.75, 0.85]


def test_an_export_without_fold_scores_still_imports(tmp_path, small_frame):
    """Exports written before the column existed lack it; importing them works."""
    from warmstart.archive.exchange import export_archive, import_export

    source = tmp_path / "source.duckdb"
    with Archive(source) as archive:
        study = archive.add_study(archive.add_task("t", small_frame, "y"), "toy", SPACE)
        archive.record_trial(study, {"x": 0.4}, 0.8, fold_scores=[0.75, 0.85])
        export_archive(archive, tmp_path / "export")
    for part in (tmp_path / "export" / "trials").rglob("*.parquet"):  # as an older warmstart wrote it
        con = duckdb.connect()
        frame = con.execute("SELECT * FROM read_parquet(?)", [str(part)]).df()
        if "fold_scores" in frame.columns:
            frame = frame.drop(columns=["fold_scores"])
            con.execute("COPY (SELECT * FROM frame) TO ? (FORMAT parquet)", [str(part)])
        con.close()
    with Archive(tmp_path / "target.duckdb") as archive:
        summary = import_export(archive, tmp_path / "export")
        assert summary.trials_new == 1
        assert archive.trials(1)["score"].tolist() == [0.8]
    assert json.loads((tmp_path / "export" / "manifest.json").read_text())["counts"]["trials"] == 1
