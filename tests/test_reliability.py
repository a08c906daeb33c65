"""Nothing corrupts the archive: real files, real processes, kill -9.

- A process killed (SIGKILL) in the middle of a large ingest, merge or import
  leaves the archive, once reopened, exactly as it was before or as it is
  after a complete run, never between: compared with a canonical dump of
  every table (``archive_digest``, rows rendered and sorted by DuckDB).
- A second process that tries to write while another holds the archive gets
  a clear message naming the file and what to do, and changes nothing.
- A long writer that commits each trial (``record_trial`` in a loop) keeps
  every finished trial when killed.

Sizes are small enough to keep the file fast; the kill points are fractions
of the time a complete run of the same command took, measured in this run.
The data is invented (random numbers, fixed seeds).
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from test_curate import SPACE, cli, digest, make_data

from warmstart.archive import Archive
from warmstart.archive.curate import archive_digest

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="SIGKILL and DuckDB file locks as on POSIX")

# The child runs the real command line in its own process: it imports, says
# "ready", waits for a line on stdin, runs the command and says when it returned.
RUN_CLI = r"""
import sys, time
from warmstart.cli import main
print("ready", flush=True)
sys.stdin.readline()
t0 = time.perf_counter()
main(sys.argv[1:], standalone_mode=False)
print("done", time.perf_counter() - t0, flush=True)
"""
RECORD_LOOP = r"""
import json, sys
import numpy as np
from warmstart.archive import Archive
archive = Archive(sys.argv[1])
study = int(sys.argv[2])
space = archive.study(study)["space"]
rng = np.random.default_rng(0)
print("ready", flush=True)
while True:
    config = space.sample(1, rng=rng)[0]
    number = archive.record_trial(study, config, float(rng.random()))
    print(number, json.dumps(config, sort_keys=True), flush=True)
"""
HOLD = r"""
import sys, time
from warmstart.archive import Archive
archive = Archive(sys.argv[1])
print("ready", flush=True)
time.sleep(120)
"""


def big_trials(n: int, seed: int) -> pd.DataFrame:
    """n valid trials of SPACE, built column by column (vectorised)."""
    rng = np.random.default_rng(seed)
    kernel = rng.choice(["rbf", "poly", "linear"], n)
    degree = np.where(kernel == "poly", rng.integers(2, 6, n), -1)
    return pd.DataFrame({
        "C": np.exp(rng.uniform(np.log(1e-3), np.log(1e3), n)).round(9),
        "tol": rng.uniform(0, 0.5, n).round(9),
        "n_trees": rng.integers(10, 1001, n),
        "depth": rng.integers(1, 9, n),
        "kernel": kernel,
        "degree": pd.Series(degree, dtype="Int64").where(degree > 0),
        "score": rng.random(n).round(9),
    })


# Columns a command sets to "now": two complete runs differ only there.
NOW_COLUMNS = {"tasks": ["created_at"], "studies": ["created_at", "finished_at", "merged_at"]}


def spawn(code: str, *args, stdin=None) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", code, *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, stdin=stdin, text=True)


def ready(proc: subprocess.Popen) -> subprocess.Popen:
    line = proc.stdout.readline()
    assert line.strip() == "ready", line + proc.stderr.read()
    return proc


def start(code: str, *args) -> subprocess.Popen:
    return ready(spawn(code, *args))


def state(path: Path) -> dict:
    with Archive(path) as archive:  # opened for writing, as the next command would
        return archive_digest(archive, ignore=NOW_COLUMNS)


def stop(proc: subprocess.Popen) -> str:
    """SIGKILL a child unless it has ended; return its output."""
    if proc.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            os.kill(proc.pid, signal.SIGKILL)
    out, _ = proc.communicate(timeout=60)
    return out


def assert_before_or_after(source: Path, args, tmp_path) -> None:
    """Two child processes run the command and are killed part-way.

    The 'after' state and the time a complete run takes come from a run of the
    same command in this process (CliRunner), made once the children have
    imported and wait, so that the timing is not slowed by their start-up.
    """
    copies = [tmp_path / f"{name}.duckdb" for name in ("full", "killed0", "killed1")]
    for path in copies:
        shutil.copyfile(source, path)
    before = state(copies[0])
    procs = [spawn(RUN_CLI, "--archive", path, *args, stdin=subprocess.PIPE) for path in copies[1:]]
    try:
        for proc in procs:
            ready(proc)
        t0 = time.perf_counter()
        result = cli(copies[0], *args)
        took = time.perf_counter() - t0
        assert result.exit_code == 0, result.output
        after = state(copies[0])
        assert after != before
        interrupted = 0
        for proc, path, fraction in zip(procs, copies[1:], (0.3, 0.6)):
            proc.stdin.write("go\n")
            proc.stdin.flush()
            time.sleep(fraction * took)
            alive = proc.poll() is None
            interrupted += alive and "done" not in stop(proc)
            assert state(path) in (before, after), f"killed at {fraction:.0%} of {took:.2f}s: the archive is in between"
        assert interrupted, f"no kill landed before the command finished (a complete run took {took:.2f}s)"
    finally:
        for proc in procs:
            stop(proc)


def copy_archive(src: Path, dst: Path) -> Path:
    shutil.copyfile(src, dst)
    return dst


@pytest.fixture(scope="module")
def world(tmp_path_factory) -> dict:
    """An archive A, a teammate's archive B (half of it already in A), an export of B, files to ingest."""
    root = tmp_path_factory.mktemp("world")
    shared, own, fresh = big_trials(40_000, 1), big_trials(40_000, 2), big_trials(100_000, 3)
    SPACE.save(root / "space.json")
    make_data(9).to_csv(root / "data.csv", index=False)
    fresh.to_parquet(root / "trials.parquet")
    with Archive(root / "a.duckdb") as a:
        task = a.add_task("stores", make_data(9), "y", profile={"log_rows": 1.0})
        a.add_trials(a.add_study(task, "svm", SPACE), shared)
    with Archive(root / "b.duckdb") as b:
        task = b.add_task("stores", make_data(9), "y", profile={"log_rows": 1.0})
        b.add_trials(b.add_study(task, "svm", SPACE), shared)
        b.add_trials(b.add_study(task, "svm", SPACE), own)
        from warmstart.archive.exchange import export_archive

        export_archive(b, root / "b_store")
    return {"root": root, "a": root / "a.duckdb"}


@pytest.mark.parametrize("command", ["ingest", "merge", "import"])
def test_kill_9_in_the_middle_leaves_the_state_before_or_after(world, tmp_path, command):
    root = world["root"]
    args = {
        "ingest": ["ingest", root / "trials.parquet", "--task", "stores", "--data", root / "data.csv",
                   "--target", "y", "--learner", "svm", "--space", root / "space.json"],
        "merge": ["curate", "merge", root / "b.duckdb"],
        "import": ["curate", "import", root / "b_store"],
    }[command]
    assert_before_or_after(world["a"], args, tmp_path)


def test_a_second_writer_gets_a_clear_message_and_changes_nothing(world, tmp_path):
    path = copy_archive(world["a"], tmp_path / "held.duckdb")
    other = copy_archive(world["root"] / "b.duckdb", tmp_path / "other.duckdb")
    before = digest(path)
    holder = start(HOLD, path)
    try:
        for args in (["curate", "dedupe"], ["tag", "1", "team=retail"], ["curate", "merge", other],
                     ["ingest", world["root"] / "trials.parquet", "--task", "stores", "--data",
                      world["root"] / "data.csv", "--target", "y", "--learner", "svm", "--space",
                      world["root"] / "space.json"]):
            result = cli(path, "--wait", "0.2", *args)
            assert result.exit_code == 1, (args, result.output)
            assert f"{path}: another process is writing to this archive" in result.stderr
            assert "still busy after the 0.2 s this command waited" in result.stderr
            assert "`warmstart serve`" in result.stderr
            assert "wait for it to finish" in result.stderr and "Traceback" not in result.output
        # the other way round: the archive to merge from is the one being written
        result = cli(other, "curate", "merge", path)
        assert result.exit_code == 1
        assert f"{path}: another process is writing to that archive" in result.stderr
    finally:
        stop(holder)
    assert digest(path) == before


def test_a_killed_writer_that_commits_each_trial_keeps_every_finished_trial(tmp_path):
    path = tmp_path / "long.duckdb"
    with Archive(path) as archive:
        task = archive.add_task("stores", make_data(9), "y", profile={"log_rows": 1.0})
        study = archive.add_study(task, "svm", SPACE)
    proc = start(RECORD_LOOP, path, study)
    finished = []
    while len(finished) < 25:
        line = proc.stdout.readline()
        assert line, proc.stderr.read()
        finished.append(line)
    rest = stop(proc)
    finished += [line for line in rest.splitlines() if line.strip()]
    printed = {int(n): json.loads(c) for n, c in (line.split(" ", 1) for line in finished)}
    with Archive(path) as archive:
        kept = archive.trials(study).set_index("number")
    assert set(printed) <= set(kept.index)  # every trial the writer saw committed is there
    assert len(kept) - len(printed) in (0, 1)  # at most one committed but not yet reported
    for number, config in printed.items():
        assert kept.loc[number, "config"] == config
