"""A trial with a time limit is stopped when the limit passes, even inside a fit.

References: scikit-learn's ``cross_val_score`` on the same folds for the
score of a trial that finished under its limit; POSIX process semantics
(``kill(pid, 0)`` fails once a process has exited and been reaped) for
"no child left behind". The slow config is an ``mlp`` with two layers of
256 units on 5,000 rows of ``sklearn.datasets.make_classification`` with
20 % flipped labels: one fold took 6-10 s with 200 units on 4,000 training
rows on the development machine (measured), so a 1 s limit always stops it
in its first fold. No test asserts how long anything took.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import json
import multiprocessing
import os
import signal
import threading
import time
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sklearn.datasets import load_iris, make_classification
from sklearn.model_selection import cross_val_score

from warmstart.archive.store import Archive
from warmstart.cli import main
from warmstart.evaluate.deadline import StoppableRunner, child_context
from warmstart.evaluate.learners import CVObjective, build_estimator, cv_objective
from warmstart.evaluate.objective import local_pool, stop_pool

pytestmark = pytest.mark.usefixtures("one_blas_thread")

SLOW_MLP = {"n_layers": 2, "width_1": 256, "width_2": 256, "activation": "relu", "alpha": 1e-6,
            "learning_rate_init": 1e-3}
SLOW_SPACE = """
[params.n_layers]
type = "choice"
choices = [2]

[params.width_1]
type = "integer"
low = 224
high = 256

[params.width_2]
type = "integer"
low = 224
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


@pytest.fixture(autouse=True)
def ctrl_c_raises():
    """Python's own Ctrl-C handler for each test: a shell that starts a command in the background
    (``cmd &`` without job control) makes it ignore SIGINT, and Python then installs no handler,
    so the Ctrl-C tests here would wait for their trials instead of seeing KeyboardInterrupt."""
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    yield
    signal.signal(signal.SIGINT, previous)


@pytest.fixture(scope="module")
def slow_frame() -> pd.DataFrame:
    X, y = make_classification(n_samples=5000, n_features=20, flip_y=0.2, random_state=0)
    return pd.DataFrame(X, columns=[f"x{i}" for i in range(20)]).assign(target=y)


@pytest.fixture(scope="module")
def iris() -> pd.DataFrame:
    return load_iris(as_frame=True).frame


def _gone(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    return False


def _trial_children() -> set[int]:
    return {p.pid for p in multiprocessing.active_children() if p.name == "warmstart-trial"}


# -- the runner, with small jobs ---------------------------------------------------
def _job(payload: dict, report) -> int:
    """A job for StoppableRunner: report stages, then do what the payload says."""
    for k in range(payload.get("stages", 0)):
        report(k)
    if "interrupt" in payload:  # Ctrl-C reaches the caller while this child is busy
        os.kill(payload["interrupt"], signal.SIGINT)
    if "raise" in payload:
        raise ValueError(payload["raise"])
    if "exit" in payload:
        os._exit(payload["exit"])
    if payload.get("kill"):
        os.kill(os.getpid(), signal.SIGKILL)
    time.sleep(payload.get("sleep", 0))
    return os.getpid()


def test_runner_keeps_its_child_until_a_timeout_and_then_reaps_it():
    runner = StoppableRunner(_job)
    try:
        first = runner.run({}, limit=60)
        assert first.status == "done" and first.value != os.getpid()
        failed = runner.run({"raise": "bad config"}, limit=60)
        assert (failed.status, failed.error) == ("error", "ValueError: bad config")
        again = runner.run({}, limit=60)
        assert again.value == first.value  # an error in the job does not cost the child
        late = runner.run({"stages": 3, "sleep": 600}, limit=0.5)
        assert (late.status, late.stage, late.value) == ("timeout", 2, None)
        assert _gone(first.value)  # terminated, joined and reaped by the time run returns
        fresh = runner.run({}, limit=60)
        assert fresh.status == "done" and fresh.value != first.value
    finally:
        runner.close()
    assert _gone(fresh.value)


def test_a_child_that_dies_is_reported_with_how_it_ended():
    runner = StoppableRunner(_job)
    try:
        exited = runner.run({"stages": 1, "exit": 3}, limit=60)
        assert exited.status == "ended" and exited.stage == 0
        assert exited.error == "the trial process ended unexpectedly: it exited with status 3"
        killed = runner.run({"kill": True}, limit=60)
        assert killed.status == "ended" and "ended by signal SIGKILL" in killed.error
        assert runner.run({}, limit=60).status == "done"  # a new child takes over
    finally:
        runner.close()


def test_ctrl_c_during_a_run_stops_the_child_and_passes_through():
    runner = StoppableRunner(_job)
    try:
        pid = runner.run({}, limit=60).value
        with pytest.raises(KeyboardInterrupt):
            runner.run({"interrupt": os.getpid(), "sleep": 600}, limit=600)
        assert _gone(pid)
    finally:
        runner.close()


def test_ctrl_c_caught_by_another_thread_still_stops_the_run():
    # A terminal's Ctrl-C is a process-wide signal; the kernel may hand it to any thread (DuckDB,
    # BLAS and pool threads run beside the main one). Python raises KeyboardInterrupt in the main
    # thread only when that thread next runs Python code, so a run must not block in one long
    # wait: here the signal goes to a helper thread while the run waits on a 60 s limit.
    runner = StoppableRunner(_job)
    try:
        pid = runner.run({}, limit=60).value
        timer = threading.Timer(0.5, lambda: signal.pthread_kill(threading.get_ident(), signal.SIGINT))
        started = time.perf_counter()
        timer.start()
        with pytest.raises(KeyboardInterrupt):
            runner.run({"sleep": 600}, limit=60)
        timer.join()
        assert time.perf_counter() - started < 30, "Ctrl-C waited for the time limit"
        assert _gone(pid)
    finally:
        runner.close()


def test_a_job_that_cannot_be_sent_is_a_failed_run_not_a_crash():
    runner = StoppableRunner(lambda payload, report: 1)  # a lambda does not pickle
    outcome = runner.run({}, limit=60)
    assert outcome.status == "ended" and outcome.error.startswith("the trial process could not start: ")
    assert "pickle" in outcome.error.lower()


def _runner_in_daemon() -> tuple:
    runner = StoppableRunner(_job)
    try:
        done = runner.run({}, limit=120)
        stopped = runner.run({"stages": 1, "sleep": 600}, limit=1)
    finally:
        runner.close()
    return multiprocessing.current_process().daemon, os.getpid(), done, stopped


def test_a_daemonic_process_runs_and_stops_trials_in_a_subprocess_child():
    # multiprocessing.Pool workers are daemonic, as Dask's nanny workers are (Python's docs: a daemonic
    # process may not create child processes); the runner starts its child with subprocess there
    with child_context().Pool(1) as pool:
        daemonic, worker, done, stopped = pool.apply(_runner_in_daemon)
    assert daemonic
    assert done.status == "done" and done.value not in (worker, os.getpid())
    assert (stopped.status, stopped.stage) == ("timeout", 0)
    assert _gone(done.value)


def test_a_subprocess_child_reports_errors_deaths_and_limits_as_a_process_child_does():
    runner = StoppableRunner(_job, command=True)
    try:
        first = runner.run({}, limit=120)
        assert first.status == "done" and first.value != os.getpid()
        assert runner.run({"raise": "bad config"}, limit=60).error == "ValueError: bad config"
        assert runner.run({}, limit=60).value == first.value  # the child is kept between runs
        killed = runner.run({"stages": 1, "kill": True}, limit=60)
        assert (killed.status, killed.stage) == ("ended", 0)
        assert killed.error == "the trial process ended unexpectedly: it was ended by signal SIGKILL"
        stopped = runner.run({"stages": 2, "sleep": 600}, limit=1)
        assert (stopped.status, stopped.stage) == ("timeout", 1)
        assert _gone(first.value)
    finally:
        runner.close()


def test_a_subprocess_child_whose_job_cannot_be_sent_is_a_failed_run():
    runner = StoppableRunner(lambda payload, report: 1, command=True)  # a lambda does not pickle
    outcome = runner.run({}, limit=60)
    assert outcome.status == "ended" and outcome.error.startswith("the trial process could not start: ")
    assert "pickle" in outcome.error.lower()
    with pytest.raises(TypeError, match="command must be True, False or None"):
        StoppableRunner(_job, command="yes")


def _owner(queue) -> None:
    runner = StoppableRunner(_job)
    queue.put(runner.run({}, limit=60).value)
    runner.run({"sleep": 600}, limit=600)


def test_a_child_whose_caller_is_killed_exits_on_its_own():
    context = child_context()
    queue = context.Queue()
    owner = context.Process(target=_owner, args=(queue,))
    owner.start()
    child = queue.get(timeout=120)
    os.kill(owner.pid, signal.SIGKILL)
    owner.join()
    for _ in range(600):  # up to about 30 s on a busy machine; it is usually at once
        if _gone(child):
            break
        time.sleep(0.05)
    assert _gone(child), f"trial process {child} outlived its killed caller"


# -- the cross-validated objective ---------------------------------------------------
def test_a_fold_over_the_limit_is_stopped_and_the_trial_failed(slow_frame):
    before = _trial_children()
    objective = cv_objective(slow_frame, "target", "mlp", time_limit=1)
    result = objective(SLOW_MLP)
    # returned while its first fold was still running: stopped, not waited for
    assert result.status == "failed" and result.score is None and result.fold_scores == ()
    assert result.error == "trial exceeded its time limit of 1 s (stopped during fold 1 of 5)"
    assert _trial_children() <= before  # the stopped child was joined
    objective.close()


def test_a_fast_trial_under_a_generous_limit_scores_as_cross_val_score(iris):
    config = {"n_neighbors": 7, "weights": "distance", "p": 1}
    limited = cv_objective(iris, "target", "knn", cv=5, seed=3, time_limit=300)
    plain = cv_objective(iris, "target", "knn", cv=5, seed=3)
    try:
        results = [limited(config), limited(config)]  # the second reuses the child process
    finally:
        limited.close()
    unlimited = plain(config)
    # reference: scikit-learn's cross_val_score on the same folds and the same pipeline
    reference = cross_val_score(build_estimator("knn", "classification", config, seed=3),
                                iris.drop(columns="target"), iris["target"], cv=limited.folds, scoring="accuracy")
    for result in results:
        assert result.status == "ok" and result.error is None
        np.testing.assert_allclose(result.fold_scores, reference, rtol=0, atol=1e-12)
        assert result.score == unlimited.score
    assert unlimited.fold_scores == results[0].fold_scores


def test_an_objective_copy_starts_its_own_child(iris):
    import pickle

    objective = cv_objective(iris, "target", "knn", cv=3, time_limit=300)
    try:
        assert objective({"n_neighbors": 3, "weights": "uniform", "p": 2}).status == "ok"
        copy = pickle.loads(pickle.dumps(objective))  # what a worker process receives
        assert isinstance(copy, CVObjective) and copy._runner is None
        assert copy({"n_neighbors": 3, "weights": "uniform", "p": 2}).score == pytest.approx(
            objective({"n_neighbors": 3, "weights": "uniform", "p": 2}).score, abs=0)
        copy.close()
    finally:
        objective.close()


class _BusyObjective(CVObjective):
    """Writes its trial process's id to a file, then fits "forever"."""

    mark: str = ""

    def fold_scores(self, config, report=None):
        report(0)
        Path(self.mark + ".part").write_text(str(os.getpid()))
        os.replace(self.mark + ".part", self.mark)
        time.sleep(600)


@contextlib.contextmanager
def _busy_pool(tmp_path, iris, workers: int):
    """A local pool with one trial running in a trial process, and that process's id.

    The pool is stopped on the way out whatever the test did, so a failing
    test leaves no busy worker behind.
    """
    objective = _BusyObjective(iris, "target", "knn", cv=3, time_limit=600)
    objective.mark = str(tmp_path / "trial-pid")
    pool, proxy = local_pool(workers, objective)
    try:
        future = pool.submit(proxy, {"n_neighbors": 3, "weights": "uniform", "p": 2})
        for _ in range(2400):  # the worker starts its own fork server first: seconds on a busy machine
            if os.path.exists(objective.mark) or future.done():
                break
            time.sleep(0.05)
        assert os.path.exists(objective.mark), future.result()
        yield pool, future, int(Path(objective.mark).read_text())
    finally:
        stop_pool(pool)


def test_stopping_the_worker_pool_stops_the_trial_processes_inside(tmp_path, iris):
    # what tune --workers N does on Ctrl-C: workers are terminated while a trial runs
    with _busy_pool(tmp_path, iris, 2) as (pool, _, trial_pid):
        workers = list(pool._processes.values())
        stop_pool(pool)
        assert workers and not any(w.is_alive() for w in workers)
        assert _gone(trial_pid)  # each worker stopped and joined its trial process before it exited


def test_a_terminated_worker_stops_its_trial_and_exits(tmp_path, iris):
    # SIGTERM without the pool shutting down (the parent killed): the worker must not stay behind
    # waiting for work, which concurrent.futures would make it do after the trial's SystemExit
    with _busy_pool(tmp_path, iris, 1) as (pool, future, trial_pid):
        (worker,) = pool._processes.values()
        os.kill(worker.pid, signal.SIGTERM)
        worker.join(60)
        assert worker.exitcode == 128 + signal.SIGTERM
        assert _gone(trial_pid)
        with pytest.raises(BrokenProcessPool):
            future.result(timeout=60)


# -- tune --time-limit ------------------------------------------------------------
def _run(tmp_path: Path, *args):
    result = CliRunner().invoke(main, ["--archive", str(tmp_path / "a.duckdb"), *map(str, args)])
    if result.exception and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result


@pytest.fixture
def slow_csv(tmp_path, slow_frame) -> tuple[Path, Path]:
    data, space = tmp_path / "slow.csv", tmp_path / "mlp.toml"
    slow_frame.to_csv(data, index=False)
    space.write_text(SLOW_SPACE)
    return data, space


@pytest.mark.parametrize("workers", [1, 2])
def test_tune_records_trials_over_the_limit_as_failed(tmp_path, slow_csv, workers):
    data, space = slow_csv
    before = _trial_children()
    budget = 2 * workers
    result = _run(tmp_path, "tune", data, "--target", "target", "--learner", "mlp", "--space", space,
                  "--budget", budget, "--time-limit", 1, "--workers", workers, "--cold")
    assert result.exit_code == 1, result.stderr  # every trial failed: a script must see it
    assert "every trial failed" in result.stderr
    assert f"{budget} trials, {budget} failed" in result.stdout and "no trial succeeded" in result.stdout
    message = "trial exceeded its time limit of 1 s (stopped during fold 1 of 5)"
    assert f"{budget} failed with: {message}" in result.stdout
    assert _trial_children() <= before  # tune closed its objective
    with Archive(tmp_path / "a.duckdb", read_only=True) as archive:
        trials = archive.trials(1)
    assert len(trials) == budget and (trials["status"] == "failed").all() and trials["score"].isna().all()
    assert (trials["error"] == message).all()
    shown = _run(tmp_path, "show", 1)
    assert shown.exit_code == 0, shown.stderr
    assert f"({budget} failed)" in shown.stdout and f"failure   {budget} x {message}" in shown.stdout
    as_json = json.loads(_run(tmp_path, "show", 1, "--json").stdout)
    assert [t["error"] for t in as_json["trials"]] == [message] * budget


class _InterruptingObjective(CVObjective):
    """Sends Ctrl-C to the caller from inside its trial process once a flag file exists."""

    flag: str = ""
    caller: int = 0

    def fold_scores(self, config, report=None):
        if os.path.exists(self.flag):
            report(0)
            os.kill(self.caller, signal.SIGINT)
            time.sleep(600)
        return super().fold_scores(config, report)


def test_ctrl_c_during_a_limited_trial_keeps_the_finished_ones(tmp_path, iris, monkeypatch):
    import warmstart.cli.tune_cmds as tune_cmds

    data, flag = tmp_path / "iris.csv", tmp_path / "interrupt-now"
    iris.to_csv(data, index=False)
    calls: list = []
    real_call = CVObjective.__call__

    def interrupting(frame, target, learner, **kwargs):
        objective = _InterruptingObjective(frame, target, learner, **kwargs)
        objective.flag, objective.caller = str(flag), os.getpid()
        return objective

    def counting(self, config):
        if len(calls) == 2:
            flag.touch()  # the third trial: Ctrl-C arrives while its child process is fitting
        calls.append(config)
        return real_call(self, config)

    monkeypatch.setattr(tune_cmds, "cv_objective", interrupting)
    monkeypatch.setattr(_InterruptingObjective, "__call__", counting)
    before = _trial_children()
    result = _run(tmp_path, "tune", data, "--target", "target", "--learner", "knn", "--budget", 10,
                  "--time-limit", 300, "--cold")
    assert result.exit_code == 130, result.output
    assert "interrupted: study 1" in result.stdout and "2 trials, 0 failed" in result.stdout
    assert _trial_children() <= before
    with Archive(tmp_path / "a.duckdb", read_only=True) as archive:
        assert len(archive.trials(1)) == 2
        assert pd.isna(archive.study(1)["finished_at"])


def _sleep_then(value):
    time.sleep(value)
    return value


def test_waiting_on_workers_notices_a_ctrl_c_caught_by_another_thread():
    # the same for the loop that waits on worker processes (run_search and map_jobs use wait_first)
    from warmstart.evaluate.workers import wait_first

    with cf.ThreadPoolExecutor(1) as pool:
        future = pool.submit(_sleep_then, 3)
        timer = threading.Timer(0.3, lambda: signal.pthread_kill(threading.get_ident(), signal.SIGINT))
        timer.start()
        with pytest.raises(KeyboardInterrupt):
            wait_first({future})
        timer.join()
        assert not future.done(), "Ctrl-C waited for the job to end"
