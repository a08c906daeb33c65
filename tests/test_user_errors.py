"""Mistakes a new user makes, answered with a message instead of a traceback.

Data: scikit-learn's bundled iris (Fisher 1936), wine (UCI) and diabetes
(Efron et al. 2004) tables, with columns changed as the comment at each test says.
"""

import math

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sklearn.datasets import load_diabetes, load_iris, load_wine

from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.errors import WarmstartError
from warmstart.gain.bits import MIN_RUNS, Runs, compare, interval_text, queries_text
from warmstart.evaluate.learners import cv_objective
from warmstart.space import Space


def _iris() -> pd.DataFrame:
    return load_iris(as_frame=True).frame


def test_a_continuous_target_tuned_as_classification_is_refused_with_the_reason():
    frame = load_diabetes(as_frame=True).frame  # column 'bmi': continuous (scaled body-mass index)
    with pytest.raises(WarmstartError, match=r"'bmi' holds non-integer numbers .*regression"):
        cv_objective(frame, "bmi", "svm", kind="classification")


def test_an_identifier_as_target_is_refused():
    frame = _iris().assign(row_id=lambda f: [f"r{i}" for i in range(len(f))])  # one label per row
    with pytest.raises(WarmstartError, match=r"'row_id' has 150 classes in 150 rows .*identifier"):
        cv_objective(frame, "row_id", "knn")


def test_a_class_with_a_single_row_is_named():
    frame = _iris()
    frame["kind"] = frame["target"].map({0: "setosa", 1: "versicolor", 2: "virginica"})
    frame.loc[0, "kind"] = "lone"  # invented label on one row
    with pytest.raises(WarmstartError, match=r"\['lone'\] have a single row"):
        cv_objective(frame.drop(columns="target"), "kind", "knn")


def test_tune_says_why_its_trials_failed(tmp_path):
    # two rows relabelled into a rare class: svm's probability calibration (used for roc_auc)
    # cannot split so few rows, so every trial fails; the summary must say why
    frame = _iris()
    frame.loc[[0, 1], "target"] = 3
    data = tmp_path / "iris_rare.csv"
    frame.to_csv(data, index=False)
    res = CliRunner().invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "tune", str(data), "--target", "target",
                                    "--learner", "svm", "--metric", "roc_auc", "--budget", "2", "--cold"])
    assert res.exit_code == 1, res.output  # every trial failed: exit status 1 (tune --help)
    assert "2 failed" in res.output and "2 failed with: ValueError" in res.output
    shown = CliRunner().invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "show", "1"])
    assert shown.exit_code == 0 and "failure   2 x ValueError" in shown.output


def test_too_few_runs_give_no_interval_and_say_so():
    # analytic: warm always hits, cold never; 2 runs each cannot support a bootstrap interval
    warm, cold = Runs(np.ones((2, 5), bool)), Runs(np.zeros((2, 5), bool))
    t = compare("t", warm, cold, p=0.05, rng=0)
    assert t.verdict == "too few runs" and math.isnan(t.gain_low) and math.isnan(t.gain_high)
    assert interval_text(t.gain_low, t.gain_high) == f"no interval: fewer than {MIN_RUNS} runs per search"
    enough = compare("t", Runs(np.ones((MIN_RUNS, 5), bool)), Runs(np.zeros((MIN_RUNS, 5), bool)), p=0.05, rng=0)
    assert enough.verdict == "helped" and interval_text(enough.gain_low, enough.gain_high).startswith("95% +")
    assert queries_text(float("inf")) == "never" and queries_text(3.0) == "3"


def test_prior_output_only_into_an_existing_folder_and_a_csv_given_as_archive(tmp_path):
    frame = _iris()
    data = tmp_path / "iris.csv"
    frame.to_csv(data, index=False)
    archive_path = tmp_path / "a.duckdb"
    with Archive(str(archive_path)) as archive:
        trials = pd.DataFrame({"n_neighbors": [1, 5, 15, 40], "score": [0.9, 0.95, 0.96, 0.9]})
        wine = load_wine(as_frame=True).frame  # a past task on other data (the new one's own studies are left out)
        archive.ingest(trials, task="wine past", data=wine, target="target", learner="knn",
                       space=Space.from_dict({"params": {"n_neighbors": {"type": "integer", "low": 1, "high": 50}}}),
                       metric="accuracy")
    out = tmp_path / "new" / "folder" / "prior.json"  # issue 17: never a chain of new folders
    res = CliRunner().invoke(main, ["--archive", str(archive_path), "prior", str(data), "--target", "target",
                                    "--learner", "knn", "-o", str(out)])
    assert res.exit_code == 2 and f"the directory {tmp_path / 'new'} does not exist" in res.stderr, res.output
    assert not (tmp_path / "new").exists()
    (tmp_path / "new" / "folder").mkdir(parents=True)
    res = CliRunner().invoke(main, ["--archive", str(archive_path), "prior", str(data), "--target", "target",
                                    "--learner", "knn", "-o", str(out)])
    assert res.exit_code == 0, res.output
    assert out.is_file()
    res = CliRunner().invoke(main, ["--archive", str(data), "studies"])
    assert res.exit_code == 1 and "not a warmstart archive" in res.output and "Traceback" not in res.output


def test_defaults_rank_each_kind_of_task_apart(tmp_path):
    # svm's regression space has 'epsilon', its classification space does not: one list must not mix them
    archive_path = str(tmp_path / "a.duckdb")
    clf = Space.from_dict({"params": {"C": {"type": "real", "low": 0.01, "high": 100.0, "log": True}}})
    reg = Space.from_dict({"params": {"C": {"type": "real", "low": 0.01, "high": 100.0, "log": True},
                                      "epsilon": {"type": "real", "low": 0.001, "high": 1.0, "log": True}}})
    with Archive(archive_path) as archive:
        archive.ingest(pd.DataFrame({"C": [0.1, 1.0, 10.0], "score": [0.8, 0.9, 0.95]}), task="iris", data=_iris(),
                       target="target", learner="svm", space=clf, metric="accuracy")
        archive.ingest(pd.DataFrame({"C": [0.1, 1.0], "epsilon": [0.01, 0.1], "score": [0.3, 0.4]}), task="diabetes",
                       data=load_diabetes(as_frame=True).frame, target="target", learner="svm", space=reg,
                       metric="r2")
    res = CliRunner().invoke(main, ["--archive", archive_path, "defaults", "--learner", "svm"])
    assert res.exit_code == 0, res.output
    clf_part, reg_part = res.output.split("regression tasks:")
    assert clf_part.startswith("classification tasks:") and "epsilon" not in clf_part
    assert "epsilon" in reg_part
    res = CliRunner().invoke(main, ["--archive", archive_path, "defaults", "--learner", "svm", "--kind", "regression"])
    assert res.exit_code == 0 and "epsilon" in res.output and "tasks:" not in res.output


def test_profile_warns_when_the_target_looks_like_an_identifier(tmp_path):
    data = tmp_path / "iris_ids.csv"
    _iris().assign(row_id=[f"r{i}" for i in range(150)]).to_csv(data, index=False)
    res = CliRunner().invoke(main, ["profile", str(data), "--target", "row_id"])
    assert res.exit_code == 0 and "has 150 classes in 150 rows; is it an identifier" in res.stderr
    res = CliRunner().invoke(main, ["profile", str(data), "--target", "target"])
    assert res.exit_code == 0 and "classes in" not in res.stderr  # iris' own target: no note on it


def test_studies_on_a_mistyped_path_creates_nothing(tmp_path):
    missing = tmp_path / "typo" / "sub" / "a.duckdb"
    res = CliRunner().invoke(main, ["--archive", str(missing), "studies"])
    assert res.exit_code == 0 and res.stdout.startswith("no studies yet: there is no archive at")
    assert not (tmp_path / "typo").exists()


def test_ingest_from_python_takes_a_built_in_metrics_direction(tmp_path):
    # rmse is an error: lower is better (scikit-learn's metric definitions)
    trials = pd.DataFrame({"C": [0.1, 1.0, 10.0], "score": [60.0, 55.0, 58.0]})
    space = Space.from_dict({"params": {"C": {"type": "real", "low": 0.01, "high": 100.0, "log": True}}})
    data = load_diabetes(as_frame=True).frame
    with Archive(str(tmp_path / "a.duckdb")) as archive:
        _, study, _ = archive.ingest(trials, task="diabetes", data=data, target="target", learner="svm", space=space,
                                     metric="rmse")
        assert archive.study(study)["direction"] == "minimize"
        with pytest.raises(WarmstartError, match="'rmse' is built in and lower is better"):
            archive.ingest(trials, task="diabetes", data=data, target="target", learner="svm", space=space,
                           metric="rmse", maximize=True)


def test_commands_print_what_reading_guessed_and_suggest_the_close_column(tmp_path):
    # iris written the way a spreadsheet set to a continental locale writes it: ';' and decimal commas
    data = tmp_path / "iris_semicolon.csv"
    _iris().rename(columns={"target": "Species_Code"}).to_csv(data, sep=";", decimal=",", index=False)
    res = CliRunner().invoke(main, ["profile", str(data), "--target", "species_code"])
    assert res.exit_code == 1 and "did you mean 'Species_Code'?" in res.output
    assert "read as semicolon-separated (';') with decimal commas" in res.stderr
    res = CliRunner().invoke(main, ["profile", str(data), "--target", "Species_Code", "--json"])
    assert res.exit_code == 0
    import json

    prof = json.loads(res.stdout)["profile"]
    assert prof["frac_categorical"] == 0.0  # the four measurements were read as numbers, not text


def test_commands_note_feature_columns_that_look_like_identifiers(tmp_path):
    data = tmp_path / "iris_ids.csv"
    _iris().assign(sample_code=[f"S{i:04d}" for i in range(150)]).to_csv(data, index=False)  # invented codes
    res = CliRunner().invoke(main, ["profile", str(data), "--target", "target"])
    assert res.exit_code == 0
    assert ("column 'sample_code' left out: looks like an identifier (text with a different value on every row); "
            "pass --keep-column sample_code to use it") in res.stderr
    assert "sepal" not in res.stderr  # the measurements are features, no note
