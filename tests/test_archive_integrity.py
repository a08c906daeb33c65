"""Integrity of what goes into the archive: a study's direction comes from its
built-in metric, impossible scores are refused (and reported by `curate
check`), filters that match nothing say so, `show --top` refuses negatives.

All data is invented (random numbers with fixed seeds, the fictional teams
"ferries" and "harbour" and the fictional owner "mirela"). Real DuckDB files in
tmp_path, commands through click's CliRunner.

Outside references: the direction of each built-in metric and its range of
values are the metric definitions in scikit-learn's documentation (User
Guide, "Metrics and scoring"): accuracy-like shares lie in [0, 1], R² is at
most 1, errors (RMSE, MAE, log loss) are at least 0 and lower is better.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner
from conftest import dump_tables

from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.evaluate.metrics import METRICS, SCORE_BOUNDS, metric_bounds

TRIALS = (
    "C,tol,n_trees,depth,kernel,degree,score\n"
    "1.0,0.1,100,3,rbf,,{a}\n"
    "0.5,0.2,50,2,poly,3,{b}\n"
    "20,0.3,10,8,linear,,{c}\n"
)


@pytest.fixture
def files(tmp_path, space, small_frame):
    space.save(tmp_path / "space.json")
    small_frame.to_csv(tmp_path / "data.csv", index=False)
    return tmp_path


def run(root, *args):
    return CliRunner().invoke(main, ["--archive", str(root / "a.duckdb"), *map(str, args)])


def ingest(root, scores=(0.8, 0.7, 0.6), name="trials.csv", *extra):
    (root / name).write_text(TRIALS.format(a=scores[0], b=scores[1], c=scores[2]))
    return run(root, "ingest", root / name, "--task", "ferry delays", "--data", root / "data.csv",
               "--target", "y", "--learner", "svm", "--space", root / "space.json", *extra)


def directions(root) -> list[str]:
    with Archive(root / "a.duckdb", read_only=True) as archive:
        return archive.studies()["direction"].tolist()


# -- 1. direction of a built-in metric ---------------------------------------------------
@pytest.mark.parametrize("metric", sorted(METRICS))
def test_ingest_takes_the_direction_of_a_built_in_metric(files, metric):
    # scikit-learn docs: accuracy, balanced accuracy, ROC AUC, F1 and R² are "greater is better";
    # log loss, RMSE and MAE are errors, "lower is better".
    expected = "minimize" if metric in ("log_loss", "rmse", "mae") else "maximize"
    result = ingest(files, (0.3, 0.2, 0.1), "trials.csv", "--metric", metric)
    assert result.exit_code == 0, result.stderr
    assert directions(files) == [expected]


def test_a_flag_contradicting_a_built_in_metric_is_refused_and_nothing_written(files):
    assert ingest(files).exit_code == 0  # the archive exists with one study
    before = dump_tables(files / "a.duckdb")
    result = ingest(files, (0.3, 0.2, 0.1), "trials.csv", "--metric", "rmse", "--maximize")
    assert result.exit_code == 1 and "Traceback" not in result.stderr
    assert "'rmse'" in result.stderr and "minimize" in result.stderr and "--maximize" in result.stderr
    result = ingest(files, (0.3, 0.2, 0.1), "trials.csv", "--metric", "accuracy", "--minimize")
    assert result.exit_code == 1
    assert "'accuracy'" in result.stderr and "maximize" in result.stderr and "--minimize" in result.stderr
    assert dump_tables(files / "a.duckdb") == before


def test_a_custom_metric_follows_the_flag(files):
    assert ingest(files, (3.0, 2.0, 1.0), "t1.csv", "--metric", "minutes late", "--minimize").exit_code == 0
    assert ingest(files, (3.0, 2.0, 1.0), "t2.csv", "--metric", "minutes late").exit_code == 0
    assert ingest(files, (3.0, 2.0, 1.0), "t3.csv", "--metric", "minutes late", "--maximize").exit_code == 0
    assert directions(files) == ["minimize", "maximize", "maximize"]


# -- 2. impossible scores ----------------------------------------------------------------
def test_every_built_in_metric_has_bounds():
    assert set(SCORE_BOUNDS) == set(METRICS)
    assert metric_bounds("minutes late") is None
    assert metric_bounds("r2") == (float("-inf"), 1.0)  # scikit-learn docs: best R² is 1.0, can be negative


@pytest.mark.parametrize("metric, scores, value, where", [
    ("balanced_accuracy", (0.8, 7.5, 0.6), "7.5", "row 2"),   # a share: [0, 1]
    ("accuracy", (0.8, 0.7, -0.1), "-0.1", "row 3"),
    ("r2", (1.5, 0.7, -3.0), "1.5", "row 1"),                 # at most 1; -3 is a legal (bad) R²
    ("rmse", (0.8, -2.0, 0.6), "-2.0", "row 2"),              # an error is >= 0
])
def test_ingest_refuses_an_impossible_score(files, metric, scores, value, where):
    assert ingest(files).exit_code == 0
    before = dump_tables(files / "a.duckdb")
    result = ingest(files, scores, "bad.csv", "--metric", metric)
    assert result.exit_code == 1 and "Traceback" not in result.stderr
    for part in ("bad.csv", where, "'score'", value, repr(metric)):
        assert part in result.stderr, (part, result.stderr)
    assert dump_tables(files / "a.duckdb") == before


def test_ingest_accepts_the_ends_of_the_range(files):
    assert ingest(files, (0.0, 1.0, 0.5), "t.csv", "--metric", "roc_auc").exit_code == 0


def test_record_refuses_an_impossible_score(files):
    assert ingest(files, (0.8, 0.7, 0.6), "t.csv", "--metric", "accuracy").exit_code == 0
    before = dump_tables(files / "a.duckdb")
    config = json.dumps({"C": 2.0, "tol": 0.1, "n_trees": 30, "depth": 4, "kernel": "rbf"})
    result = run(files, "record", "--study", 1, "--config", config, "--score", 2.5)
    assert result.exit_code == 1 and "Traceback" not in result.stderr
    assert "2.5" in result.stderr and "'accuracy'" in result.stderr and "between 0 and 1" in result.stderr
    assert dump_tables(files / "a.duckdb") == before
    assert run(files, "record", "--study", 1, "--config", config, "--score", 0.9).exit_code == 0


def test_check_reports_impossible_scores_already_stored(files):
    assert ingest(files, (0.8, 0.7, 0.6), "t.csv", "--metric", "accuracy").exit_code == 0
    assert run(files, "curate", "check").exit_code == 0
    with Archive(files / "a.duckdb") as archive:  # an older archive, written before the check existed
        archive.con.execute("UPDATE trials SET score = 2.5 WHERE study_id = 1 AND number = 2")
    result = run(files, "curate", "check", "--json")
    assert result.exit_code == 1
    found = {f["check"]: f for f in json.loads(result.stdout)["findings"]}
    assert found["scores_out_of_range"]["count"] == 1
    assert found["scores_out_of_range"]["examples"] == ["study 1 trial 2 (accuracy 2.5)"]
    assert "scores_out_of_range" in run(files, "curate", "check").stdout


# -- 3. studies filters that match nothing; 6. show --top --------------------------------
def test_studies_filter_matching_nothing_says_so(files):
    assert ingest(files).exit_code == 0
    result = run(files, "studies", "--owner", "mirela")
    assert result.exit_code == 0
    assert "no study matches these filters" in result.stdout and "no studies yet" not in result.stdout
    empty = CliRunner().invoke(main, ["--archive", str(files / "empty.duckdb"), "studies"])
    assert "no studies yet" in empty.stdout


def test_show_refuses_a_negative_top(files):
    assert ingest(files).exit_code == 0
    result = run(files, "show", 1, "--top", -2)
    assert result.exit_code == 2 and "--top" in result.stderr and "-2" in result.stderr
    assert run(files, "show", 1, "--top", 0).exit_code == 0  # 0 = all, as the help says


# -- 5. why no past study feeds a prior ----------------------------------------------------
def test_prior_names_why_each_study_was_left_out(files, small_frame):
    # study 1: only 2 trials (a prior needs >= 3 successful trials per study, load_sources' min_trials)
    (files / "two.csv").write_text(TRIALS.format(a=0.8, b=0.7, c="").rsplit("\n", 2)[0] + "\n")
    assert ingest_file(files, "two.csv", "ferry delays").exit_code == 0
    # study 2: 3 trials, but on the very data the prior is asked for (its task is excluded)
    new_data = small_frame.assign(f1=small_frame["f1"] * 2)
    new_data.to_csv(files / "new.csv", index=False)
    (files / "three.csv").write_text(TRIALS.format(a=0.8, b=0.7, c=0.6))
    assert ingest_file(files, "three.csv", "harbour queue", data="new.csv").exit_code == 0
    result = run(files, "prior", files / "new.csv", "--target", "y", "--learner", "svm", "--space", files / "space.json")
    assert result.exit_code == 1 and "Traceback" not in result.stderr
    assert "of its 2 study(ies), 1 have fewer than 3 successful trials" in result.stderr
    assert "1 are of an excluded task" in result.stderr
    assert "another kind of task" not in result.stderr  # a reason that excluded nothing is not named


def ingest_file(root, name, task, data="data.csv"):
    return run(root, "ingest", root / name, "--task", task, "--data", root / data, "--target", "y",
               "--learner", "svm", "--space", root / "space.json")
