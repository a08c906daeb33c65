"""``tune --cluster`` and ``gain --cluster`` on a real Dask cluster on loopback.

One scheduler and two worker processes (``distributed.LocalCluster`` with
``processes=True``: each worker is started by a nanny, as ``dask worker``
starts them, and is daemonic) listen on 127.0.0.1 only, for the whole
module, and are closed at its end.

References: scikit-learn's ``cross_val_score`` on the same folds for the
scores recorded by trials that ran on the workers; Dask's task stream
(``distributed.get_task_stream``) for where they ran; the local replay
(``gain`` without ``--cluster``, same seed) for the cluster's replay
figures. The slow config is the one of ``tests/test_time_limit.py`` (an
``mlp`` of two 256-unit layers on 5,000 rows of ``make_classification``;
one fold took several seconds there, measured), so a 1 s limit stops it in
its first fold. Nothing here asserts how long anything took.
"""

from __future__ import annotations

import json
import multiprocessing

import dask
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from distributed import Client, LocalCluster, get_task_stream
from sklearn.datasets import load_iris, make_classification
from sklearn.model_selection import cross_val_score

from warmstart.archive.store import Archive
from warmstart.cli import main
from warmstart.evaluate.learners import build_estimator, cv_objective
from warmstart.space import Space

pytestmark = pytest.mark.usefixtures("one_blas_thread")

SLOW_SPACE = """
[params.n_layers]
type = "choice"
choices = [2]

[params.width_1]
type = "integer"
low = 240
high = 256

[params.width_2]
type = "integer"
low = 240
high = 256
when = { n_layers = [2] }

[params.activation]
type = "choice"
choices = ["relu"]

[params.alpha]
type = "real"
low = 1e-6
high = 1e-5
log = true

[params.learning_rate_init]
type = "real"
low = 1e-3
high = 1.5e-3
log = true
"""


@pytest.fixture(scope="module")
def cluster():
    """A scheduler and two single-thread worker processes on loopback; yields (address, client)."""
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=":0") as local, Client(local) as client:
        client.wait_for_workers(2, timeout=120)
        yield local.scheduler_address, client


@pytest.fixture(scope="module")
def iris_csv(tmp_path_factory):
    path = tmp_path_factory.mktemp("cluster") / "iris.csv"
    load_iris(as_frame=True).frame.to_csv(path, index=False)
    return path


def _tune(tmp_path, *args):
    return CliRunner().invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "tune", *map(str, args), "--json"])


def _trials(tmp_path, study: int) -> pd.DataFrame:
    archive = Archive(str(tmp_path / "a.duckdb"), read_only=True)
    try:
        return archive.trials(study)
    finally:
        archive.close()


def _evaluations(stream: list) -> list:
    """The trial evaluations in a task stream, with the worker each ran on."""
    return [task["worker"] for task in stream if str(task["key"]).startswith("_evaluate")]


def test_the_workers_are_daemonic_as_dask_starts_them(cluster):
    # the condition that made every limited trial fail before: Python may not start a
    # multiprocessing child in a daemonic process
    _, client = cluster
    assert set(client.run(lambda: multiprocessing.current_process().daemon).values()) == {True}


@pytest.mark.parametrize("limit", [None, 120])
def test_tune_on_a_cluster_records_trials_scored_as_cross_val_score(cluster, iris_csv, tmp_path, limit):
    address, client = cluster
    extra = [] if limit is None else ["--time-limit", limit]
    with get_task_stream(client) as stream:
        res = _tune(tmp_path, iris_csv, "--target", "target", "--learner", "knn", "--budget", 2, "--cold",
                    "--seed", 3, "--cluster", address, *extra)
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    assert (summary["trial_count"], summary["n_failed"]) == (2, 0), summary["failures"]
    workers = _evaluations(stream.data)
    assert len(workers) == 2 and set(workers) <= set(client.nthreads())
    trials = _trials(tmp_path, summary["study_id"])
    assert len(trials) == 2 and (trials["status"] == "ok").all()
    # reference: scikit-learn's cross_val_score on the folds the objective uses (same seed)
    frame = load_iris(as_frame=True).frame
    folds = cv_objective(frame, "target", "knn", seed=3).folds
    for _, row in trials.iterrows():
        reference = cross_val_score(build_estimator("knn", "classification", row["config"], seed=3),
                                    frame.drop(columns="target"), frame["target"], cv=folds, scoring="accuracy")
        assert row["score"] == pytest.approx(float(np.mean(reference)), abs=1e-12)


def test_a_trial_past_its_limit_on_a_cluster_is_stopped_and_recorded_failed(cluster, tmp_path):
    address, client = cluster
    X, y = make_classification(n_samples=5000, n_features=20, flip_y=0.2, random_state=0)
    data = tmp_path / "slow.csv"
    pd.DataFrame(X, columns=[f"x{i}" for i in range(20)]).assign(target=y).to_csv(data, index=False)
    space = tmp_path / "slow.toml"
    space.write_text(SLOW_SPACE)
    with get_task_stream(client) as stream:
        res = _tune(tmp_path, data, "--target", "target", "--learner", "mlp", "--space", space, "--budget", 2,
                    "--cold", "--cluster", address, "--time-limit", 1)
    assert "Traceback" not in res.stderr, res.stderr
    summary = json.loads(res.stdout)
    message = "trial exceeded its time limit of 1 s (stopped during fold 1 of 5)"
    assert (summary["trial_count"], summary["n_failed"], summary["failures"]) == (2, 2, {message: 2})
    assert len(_evaluations(stream.data)) == 2
    trials = _trials(tmp_path, summary["study_id"])
    assert list(trials["status"]) == ["failed", "failed"] and list(trials["error"]) == [message, message]
    assert trials["score"].isna().all()


def test_gain_on_a_cluster_prints_the_figures_of_a_local_replay(cluster, tmp_path):
    address, client = cluster
    space = Space.from_dict({"params": {
        "a": {"type": "real", "low": 0.0, "high": 1.0},
        "b": {"type": "real", "low": 0.01, "high": 100.0, "log": True},
        "c": {"type": "choice", "choices": ["x", "y"]},
    }})
    path = tmp_path / "history.duckdb"
    archive = Archive(str(path))
    # invented history for this test only (the landscape of tests/test_replay.py): the best `a` and
    # `b` move with a task's setting, and so do its data's size and noise
    for i, setting in enumerate(np.linspace(0.1, 0.9, 4)):
        configs = space.sobol(48, 0)
        trials = pd.DataFrame(configs)
        u = space.encode(configs)
        trials["score"] = -(u[:, 0] - setting) ** 2 - (u[:, 1] - 0.5 * setting) ** 2 + 0.02 * (trials["c"] == "y")
        rng = np.random.default_rng(i)
        n, d = 120 + int(200 * setting), 3 + int(6 * setting)
        frame = pd.DataFrame(rng.normal(size=(n, d)) * (1 + 3 * setting), columns=[f"f{j}" for j in range(d)])
        frame["label"] = (frame["f0"] + rng.normal(scale=0.5 + 2 * setting, size=n) > 0).astype(int)
        archive.ingest(trials, task=f"invented task {i}", data=frame, target="label", learner="toy",
                       space=space, metric="score")
    archive.close()
    args = ["--archive", str(path), "gain", "--learner", "toy", "--budget", "4", "--repeats", "3", "--seed", "7",
            "--json"]
    local = CliRunner().invoke(main, args)
    assert local.exit_code == 0, local.output
    with get_task_stream(client) as stream:
        remote = CliRunner().invoke(main, args + ["--cluster", address])
    assert remote.exit_code == 0, remote.output
    assert json.loads(remote.stdout) == json.loads(local.stdout)
    assert len(json.loads(local.stdout)[0]["tasks"]) == 4
    replays = [task for task in stream.data if str(task["key"]).startswith("_one_task")]
    assert len(replays) == 4


def test_cluster_errors_are_clear(iris_csv, tmp_path):
    # nothing listens on port 9 (discard); Dask's connect timeout is shortened for the test
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        res = _tune(tmp_path, iris_csv, "--target", "target", "--learner", "knn", "--budget", 1,
                    "--cluster", "tcp://127.0.0.1:9")
    assert res.exit_code == 1
    assert "--cluster tcp://127.0.0.1:9: cannot connect to the Dask scheduler" in res.stderr
    assert "Traceback" not in res.stderr
    res = CliRunner().invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "gain", "--data", str(iris_csv),
                                    "--target", "target", "--learner", "knn", "--cluster", "tcp://127.0.0.1:9"])
    assert res.exit_code == 1 and "--cluster spreads a replay's held-out tasks" in res.stderr
