"""The archive commands through click's CliRunner: init, ingest, studies, show,
with --json, --archive and WARMSTART_ARCHIVE, and every bad input (a clean
message naming the culprit, a non-zero exit code, no traceback, nothing lost)."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import duckdb
import pandas as pd
import pytest
from click.testing import CliRunner

from warmstart.archive import SCHEMA_VERSION
from warmstart.cli import main
from warmstart.space import Space

REPO = Path(__file__).resolve().parent.parent
TRIALS = (
    "C,tol,n_trees,depth,kernel,degree,score,status,cost_s\n"
    "1.0,0.1,100,3,rbf,,0.8,ok,1.5\n"
    "0.5,0.2,50,2,poly,3,0.7,ok,2\n"
    "20,0.3,10,8,linear,,,ok,\n"
)


@pytest.fixture
def files(tmp_path, space, small_frame):
    space.save(tmp_path / "svm space.toml")
    small_frame.to_csv(tmp_path / "data.csv", index=False)
    (tmp_path / "trials.csv").write_text(TRIALS)
    return SimpleNamespace(
        space=tmp_path / "svm space.toml", data=tmp_path / "data.csv", trials=tmp_path / "trials.csv",
        archive=tmp_path / "team" / "history.duckdb", root=tmp_path,
    )


def run(*args, archive=None, env=None):
    runner = CliRunner()
    prefix = ["--archive", str(archive)] if archive is not None else []
    return runner.invoke(main, prefix + [str(a) for a in args], env=env)


def ingest_args(files, trials=None, task="churn north", learner="svm", *extra):
    return ["ingest", trials or files.trials, "--task", task, "--data", files.data, "--target", "y",
            "--learner", learner, "--space", files.space, *extra]


def assert_ok(result):
    assert result.exit_code == 0, (result.stdout, result.stderr, result.exception)
    assert result.stderr == ""


def assert_clean_failure(result, *parts, code=1):
    """Non-zero exit, a message on stderr naming every part, no traceback, nothing on stdout."""
    assert result.exit_code == code, (result.stdout, result.stderr, result.exception)
    assert isinstance(result.exception, SystemExit)  # not an uncaught Python error
    assert "Traceback" not in result.stderr + result.stdout
    assert result.stdout == ""
    assert result.stderr.startswith("Error: " if code == 1 else "Usage: ")
    for part in parts:
        assert part in result.stderr, (part, result.stderr)


# -- where the archive is ------------------------------------------------------------------


def test_init_with_archive_option(files):
    result = run("init", archive=files.archive)
    assert_ok(result)
    assert result.stdout == f"archive ready: {files.archive} (schema {SCHEMA_VERSION}, 0 studies)\n"
    assert files.archive.exists()
    assert_ok(run("init", archive=files.archive))  # again: checks, changes nothing


def test_init_with_environment_variable(files):
    result = run("init", env={"WARMSTART_ARCHIVE": str(files.archive)})
    assert_ok(result)
    assert str(files.archive) in result.stdout and files.archive.exists()


def test_option_wins_over_environment(files):
    other = files.root / "other.duckdb"
    assert_ok(run("init", archive=files.archive, env={"WARMSTART_ARCHIVE": str(other)}))
    assert files.archive.exists() and not other.exists()


def test_default_archive_location(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run("init", env={"WARMSTART_ARCHIVE": None})
    assert_ok(result)
    assert result.stdout.startswith("archive ready: archive/warmstart.duckdb ")
    assert (tmp_path / "archive" / "warmstart.duckdb").exists()


# -- the happy path ----------------------------------------------------------------------


def test_ingest_studies_show(files, space):
    result = run(*ingest_args(files), archive=files.archive)
    assert_ok(result)
    assert result.stdout == "ingested 3 trials of 'svm' on task 'churn north' as study 1 (1 failed; best score 0.8)\n"

    result = run("studies", archive=files.archive)
    assert_ok(result)
    header, rule, line = result.stdout.splitlines()
    assert header.split() == ["study_id", "task", "learner", "metric", "direction", "origin", "trial_count",
                              "best_score", "owner", "tags", "created_at"]
    assert line.split()[:9] == ["1", "churn", "north", "svm", "score", "maximize", "imported", "3", "0.8"]

    result = run("show", "1", archive=files.archive)
    assert_ok(result)
    assert "study 1: svm on task 'churn north' (imported)" in result.stdout
    assert "trials    3 (1 failed)" in result.stdout and "best      0.8" in result.stdout
    assert "kernel: one of \"rbf\", \"poly\", \"linear\"" in result.stdout
    rows = [line.split() for line in result.stdout.splitlines()[-2:]]
    assert rows == [["1", "1", "0.1", "100", "3", "rbf", "-", "0.8", "1.5"],
                    ["2", "0.5", "0.2", "50", "2", "poly", "3", "0.7", "2"]]


def test_json_output(files, space):
    result = run(*ingest_args(files), "--metric", "auc", "--owner", "ana", "--tag", "team=retail", "--json",
                 archive=files.archive)
    assert_ok(result)
    assert json.loads(result.stdout) == {"task_id": 1, "task": "churn north", "study_id": 1, "trials": 3,
                                         "failed": 1, "best_score": 0.8}
    studies = json.loads(run("studies", "--json", archive=files.archive).stdout)
    assert len(studies) == 1
    assert {k: studies[0][k] for k in ("study_id", "task", "learner", "metric", "trial_count", "best_score", "owner", "tags")} == {
        "study_id": 1, "task": "churn north", "learner": "svm", "metric": "auc", "trial_count": 3,
        "best_score": 0.8, "owner": "ana", "tags": {"team": "retail"}}
    shown = json.loads(run("show", "1", "--json", archive=files.archive).stdout)
    assert Space.from_dict(shown["space"]) == space
    assert shown["direction"] == "maximize" and shown["trial_count"] == 3
    assert [t["score"] for t in shown["trials"]] == [0.8, 0.7, None]
    assert [t["status"] for t in shown["trials"]] == ["ok", "ok", "failed"]
    assert shown["trials"][1]["degree"] == 3 and shown["trials"][0]["degree"] is None
    assert json.loads(run("studies", "--json", "--learner", "forest", archive=files.archive).stdout) == []


@pytest.mark.parametrize("suffix", [".parquet", ".jsonl"])
def test_ingest_parquet_and_json_lines(files, suffix):
    frame = pd.read_csv(files.trials)
    path = files.root / f"trials{suffix}"
    if suffix == ".parquet":
        frame.assign(degree=frame["degree"].astype("Int64")).to_parquet(path)
    else:
        frame.to_json(path, orient="records", lines=True)
    assert_ok(run(*ingest_args(files, trials=path), "--minimize", archive=files.archive))
    studies = json.loads(run("studies", "--json", archive=files.archive).stdout)
    assert (studies[0]["trial_count"], studies[0]["direction"], studies[0]["best_score"]) == (3, "minimize", 0.7)


def test_same_task_is_reused_and_names_are_verbatim(files):
    name = "Robert'); DROP TABLE tasks; -- \"quoted\""
    assert_ok(run(*ingest_args(files, task=name), archive=files.archive))
    assert_ok(run(*ingest_args(files, task=name, learner="svm; DELETE FROM trials"), archive=files.archive))
    studies = json.loads(run("studies", "--json", archive=files.archive).stdout)
    assert [s["task"] for s in studies] == [name, name]
    assert [s["learner"] for s in studies] == ["svm", "svm; DELETE FROM trials"]
    con = duckdb.connect(str(files.archive), read_only=True)
    assert con.execute("SELECT count(*), min(name) FROM tasks").fetchall() == [(1, name)]
    con.close()


def test_studies_on_an_empty_archive(files):
    result = run("studies", archive=files.archive)
    assert_ok(result)
    assert result.stdout.startswith("no studies yet")


# -- bad input ----------------------------------------------------------------------------

HEAD = "C,tol,n_trees,depth,kernel,degree,score"
BAD_TRIALS = [
    ("unknown column", "trials.csv", HEAD + ",gamma\n1.0,0.1,100,3,rbf,,0.8,1\n", ["unknown column(s) ['gamma']"]),
    ("missing column", "trials.csv", "C,tol,n_trees,kernel,degree,score\n1.0,0.1,100,rbf,,0.8\n", ["missing column(s) for parameter(s) ['depth']"]),
    ("outside the space", "trials.csv", HEAD + "\n1.0,0.1,100,3,rbf,,0.8\n1.0,0.1,100,12,rbf,,0.8\n", ["row 2, column 'depth': value 12 is out of range", "integer in [1, 8]"]),
    ("text in a number column", "trials.csv", HEAD + "\n1.0,lots,100,3,rbf,,0.8\n", ["row 1, column 'tol': value 'lots' is not a number"]),
    ("boolean", "trials.csv", HEAD + "\nTrue,0.1,100,3,rbf,,0.8\n", ["row 1, column 'C': value True is a boolean"]),
    ("not an integer", "trials.csv", HEAD + "\n1.0,0.1,100.5,3,rbf,,0.8\n", ["row 1, column 'n_trees': value 100.5 is not a whole number"]),
    ("unknown level", "trials.csv", HEAD + "\n1.0,0.1,100,3,sigmoid,,0.8\n", ["row 1, column 'kernel': value 'sigmoid' is not allowed", 'one of "rbf", "poly", "linear"']),
    ("bad status", "trials.csv", HEAD + ",status\n1.0,0.1,100,3,rbf,,0.8,crashed\n", ["row 1, column 'status': value 'crashed' is not a status"]),
    ("bad date", "trials.csv", HEAD + ",started_at\n1.0,0.1,100,3,rbf,,0.8,last tuesday\n", ["row 1, column 'started_at': value 'last tuesday' is not a date-time"]),
    ("negative cost", "trials.csv", HEAD + ",cost_s\n1.0,0.1,100,3,rbf,,0.8,-3.5\n", ["row 1, column 'cost_s': value -3.5 is not a cost in seconds"]),
    ("empty file", "trials.csv", "", ["the file is empty"]),
    ("header only", "trials.csv", HEAD + "\n", ["the table has a header but no rows"]),
    ("malformed", "trials.csv", HEAD + '\n1.0,0.1,"100,3,rbf,,0.8\n', ["not a valid CSV file"]),
    ("malformed json lines", "trials.jsonl", '{"C": 1.0,\n', ["not a valid JSON lines file"]),
    ("wrong extension", "trials.xls", HEAD + "\n1.0,0.1,100,3,rbf,,0.8\n", ["cannot tell the format from the extension '.xls'"]),
]


@pytest.mark.parametrize("case, name, content, parts", BAD_TRIALS, ids=[c[0] for c in BAD_TRIALS])
def test_bad_trials_file(files, table_dump, case, name, content, parts):
    assert_ok(run(*ingest_args(files, task="earlier"), archive=files.archive))
    before = table_dump(files.archive)
    path = files.root / name
    path.write_text(content)
    result = run(*ingest_args(files, trials=path), archive=files.archive)
    assert_clean_failure(result, str(path), *parts)
    assert table_dump(files.archive) == before


def test_missing_trials_file(files):
    result = run(*ingest_args(files, trials=files.root / "nope.csv"), archive=files.archive)
    assert_clean_failure(result, "nope.csv: no such file")


@pytest.mark.parametrize(
    "spec, parts",
    [
        ({"C": {"type": "real", "low": 10.0, "high": 1.0}}, ["parameter 'C' has low=10.0 >= high=1.0"]),
        ({"C": {"type": "real", "low": 0.0, "high": 1.0, "log": True}}, ["parameter 'C' is on a log scale but low=0.0", "positive bounds"]),
        ({"C": {"type": "decimal", "low": 0.0, "high": 1.0}}, ["parameter 'C' has type 'decimal'", "real, integer, choice"]),
    ],
)
def test_bad_space_file(files, table_dump, spec, parts):
    path = files.root / "bad space.json"
    path.write_text(json.dumps({"params": spec}))
    assert_ok(run("init", archive=files.archive))
    before = table_dump(files.archive)
    result = run("ingest", files.trials, "--task", "t", "--data", files.data, "--target", "y", "--learner", "svm",
                 "--space", path, archive=files.archive)
    assert_clean_failure(result, str(path), *parts)
    assert table_dump(files.archive) == before


def test_unreadable_space_file(files):
    path = files.root / "space.toml"
    path.write_text("[params.C\ntype = ")
    result = run(*ingest_args(files)[:-2], "--space", path, archive=files.archive)
    assert_clean_failure(result, str(path), "not a valid TOML file")


def test_bad_data_file(files, table_dump):
    assert_ok(run("init", archive=files.archive))
    before = table_dump(files.archive)
    result = run("ingest", files.trials, "--task", "t", "--data", files.data, "--target", "label",
                 "--learner", "svm", "--space", files.space, archive=files.archive)
    assert_clean_failure(result, str(files.data), "target column 'label' not found", "['f1', 'f2', 'f3', 'y']")
    assert table_dump(files.archive) == before


def test_unknown_learner_without_space(files):
    result = run("ingest", files.trials, "--task", "t", "--data", files.data, "--target", "y",
                 "--learner", "my-own-model", archive=files.archive)
    assert_clean_failure(result, "my-own-model")


def test_bad_tag_is_a_usage_error(files):
    result = run(*ingest_args(files), "--tag", "no-equals-sign", archive=files.archive)
    assert_clean_failure(result, "--tag", "'no-equals-sign' is not KEY=VALUE", code=2)


def test_show_unknown_study_and_missing_archive(files):
    assert_ok(run("init", archive=files.archive))
    assert_clean_failure(run("show", "99", archive=files.archive), "no study with id 99")
    assert_clean_failure(run("show", "1", archive=files.root / "none.duckdb"), "none.duckdb: no archive here", "warmstart init")
    assert not (files.root / "none.duckdb").exists()


# -- bad archives -------------------------------------------------------------------------


def _not_duckdb(path):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("a plain text file\n")
    return "not a warmstart archive (the file is not a DuckDB database)"


def _other_duckdb(path):
    path.parent.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE stock (item VARCHAR, units INTEGER)")
    con.close()
    return "a DuckDB database but not a warmstart archive"


def _newer_schema(path):
    assert run("init", archive=path).exit_code == 0
    con = duckdb.connect(str(path))
    con.execute("INSERT INTO schema_version VALUES (?, now(), ?)", [99, "9.9.9"])
    con.close()
    return f"archive schema version 99 is newer than this warmstart understands ({SCHEMA_VERSION}); upgrade warmstart"


@pytest.mark.parametrize("make", [_not_duckdb, _other_duckdb, _newer_schema], ids=["not duckdb", "not an archive", "newer schema"])
@pytest.mark.parametrize("command", ["init", "ingest", "studies", "show"])
def test_bad_archive_file(files, table_dump, make, command):
    message = make(files.archive)
    before = files.archive.read_bytes() if make is _not_duckdb else table_dump(files.archive)
    args = {"init": ["init"], "ingest": ingest_args(files), "studies": ["studies"], "show": ["show", "1"]}[command]
    result = run(*args, archive=files.archive)
    assert_clean_failure(result, str(files.archive), message)
    after = files.archive.read_bytes() if make is _not_duckdb else table_dump(files.archive)
    assert after == before


def test_second_writer(files, table_dump, held_open):
    assert_ok(run(*ingest_args(files, task="earlier"), archive=files.archive))
    before = table_dump(files.archive)
    with held_open(files.archive) as pid:
        for args in (ingest_args(files), ["init"], ["studies"]):
            result = run("--wait", "0.3", *args, archive=files.archive)
            assert_clean_failure(result, str(files.archive), "another process is writing to this archive",
                                 f"held by process {pid}", "still busy after the 0.3 s this command waited",
                                 "--wait SECONDS", "`warmstart serve`", "nothing was changed")
    assert table_dump(files.archive) == before
    result = run(*ingest_args(files), archive=files.archive)  # free again once the other process is done
    assert result.exit_code == 0, result.stderr
    # the same data under another task name: the trials are copies of the first study's, and it says so
    assert result.stderr.startswith("warning: 3 of the 3 trials just ingested are identical to trials of study(ies) 1")


def test_help_lists_the_commands():
    result = run("--help")
    assert_ok(result)
    for command in ("init", "ingest", "studies", "show"):
        assert re.search(rf"^\s+{command}\s", result.stdout, re.MULTILINE)
    assert "WARMSTART_ARCHIVE" in result.stdout


# -- taking turns on one file without a service (--wait; tune holds the file only to write) ----
_SLOW_TRIAL = (  # an invented objective: reads the config on stdin, "trains" for a moment, prints a score
    "import json, sys, time\n"
    "config = json.load(sys.stdin)\n"
    "time.sleep(1.0)\n"
    "print(json.dumps({'score': 1.0 / (1.0 + abs(config['C'] - 1.0))}))\n"
)


def _tune(files, task: str, budget: int) -> subprocess.Popen:
    script = files.root / "slow_trial.py"
    script.write_text(_SLOW_TRIAL)
    args = [sys.executable, "-c", "from warmstart.cli import main; main()", "--archive", str(files.archive),
            "--wait", "30", "tune", str(files.data), "--target", "y", "--learner", "mine", "--space", str(files.space),
            "--command", f"{sys.executable} {script}", "--budget", str(budget), "--task", task, "--cold"]
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}  # this checkout
    return subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def test_commands_wait_for_a_busy_archive_and_go_on_when_it_is_free(files):
    assert_ok(run(*ingest_args(files), archive=files.archive))
    code = ("import sys, time, duckdb; con = duckdb.connect(sys.argv[1]); print('ready', flush=True); "
            "time.sleep(1.0); con.close()")
    holder = subprocess.Popen([sys.executable, "-c", code, str(files.archive)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "ready"
        result = run("--wait", "30", "studies", "--json", archive=files.archive)  # waits the second out
        assert holder.poll() is not None  # it got in only after the holder had gone
    finally:
        holder.wait(30)
        holder.stdout.close()
    assert_ok(result)
    assert [s["task"] for s in json.loads(result.stdout)] == ["churn north"]


def test_studies_run_while_two_tunes_train_on_one_archive_and_both_finish(files):
    assert_ok(run("init", archive=files.archive))
    tunes = [_tune(files, "north", 2), _tune(files, "south", 2)]
    try:
        seen = []
        deadline = time.monotonic() + 240  # bounded; starting two interpreters on a busy machine is slow
        while time.monotonic() < deadline and any(t.poll() is None for t in tunes):
            result = run("--wait", "30", "studies", "--json", archive=files.archive)
            assert result.exit_code == 0, result.stderr
            seen.append((any(t.poll() is None for t in tunes), json.loads(result.stdout)))
            time.sleep(0.2)
        outs = [t.communicate(timeout=120) for t in tunes]
    finally:
        for t in tunes:
            if t.poll() is None:
                t.kill()
                t.communicate()
    for t, (out, err) in zip(tunes, outs):
        assert t.returncode == 0, err
    # a read answered while a tune was running, its study short of its trials (before: refused until it ended)
    assert any(running and any(s["task"] in ("north", "south") and s["trial_count"] < 2 for s in studies)
               for running, studies in seen), seen
    result = run("studies", "--json", archive=files.archive)
    assert_ok(result)
    assert sorted((s["task"], s["trial_count"]) for s in json.loads(result.stdout)) == [("north", 2), ("south", 2)]


# -- the service's tables: removed with what they name, never carried to another archive --------
def _served_archive(path: Path) -> dict:
    """An archive a service wrote to: a study with a recorded lease (ok), a failed one and a pending
    one, a stored request id, through the real API in process (FastAPI's test client)."""
    from fastapi.testclient import TestClient
    from service_support import SPACE, new_task, seed_archive

    from warmstart.archive.store import Archive
    from warmstart.service import create_app

    seed_archive(path)
    with TestClient(create_app(Archive(path))) as c:
        study = c.post("/api/v1/studies", json={"task": new_task(), "learner": "bran", "space": SPACE,
                                                "metric": "loss", "maximize": False, "cold": True}).json()["study_id"]
        leases = c.post(f"/api/v1/studies/{study}/propose", json={"k": 3}).json()["leases"]
        c.post(f"/api/v1/studies/{study}/trials", json={"trial": leases[0]["trial"], "score": 1.5},
               headers={"Idempotency-Key": "job-7-result-1"}).raise_for_status()
        c.post(f"/api/v1/studies/{study}/trials", json={"trial": leases[1]["trial"], "status": "failed"})
    return {"study": study, "leases": [lease["trial"] for lease in leases]}


def _service_rows(path: Path) -> dict[str, int]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        return {t: con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0] for t in ("leases", "requests")}
    finally:
        con.close()


def test_prune_removes_the_leases_of_what_it_removes(tmp_path):
    path = tmp_path / "served.duckdb"
    made = _served_archive(path)
    assert_ok(run("curate", "prune", "--failed", "--learner", "bran", "--yes", archive=path))
    con = duckdb.connect(str(path), read_only=True)
    states = dict(con.execute("SELECT trial_id, state FROM leases").fetchall())
    con.close()
    # the failed trial's lease went with it; the recorded ok one and the pending one stay
    assert states == {made["leases"][0]: "recorded", made["leases"][2]: "pending"}
    assert_ok(run("curate", "prune", "--learner", "bran", "--yes", archive=path))  # every bran study
    assert _service_rows(path)["leases"] == 0


def test_check_fix_keeps_a_study_whose_only_rows_are_pending_proposals(tmp_path):
    # a study the service just created and handed proposals out of has no trial yet, but it is in use
    from fastapi.testclient import TestClient
    from service_support import SPACE, new_task, seed_archive

    from warmstart.archive.curate import check_archive, fix_archive
    from warmstart.archive.store import Archive
    from warmstart.service import create_app

    path = tmp_path / "served.duckdb"
    seed_archive(path)
    with TestClient(create_app(Archive(path))) as c:
        study = c.post("/api/v1/studies", json={"task": new_task(), "learner": "bran", "space": SPACE,
                                                "metric": "loss", "maximize": False, "cold": True}).json()["study_id"]
        c.post(f"/api/v1/studies/{study}/propose", json={"k": 2}).raise_for_status()
    with Archive(path) as archive:
        frame = pd.DataFrame({"x": [1.0, 2.0, 3.0], "y": [0, 1, 0]})
        empty = archive.add_study(archive.add_task("never tuned", frame, "y"), "bran", Space.from_dict(SPACE))
        found = {f.check: f for f in check_archive(archive).findings}["studies_without_trials"]
        assert (found.count, list(found.examples)) == (1, [f"study {empty}"])  # the study with leases is not one
        fix_archive(archive)
        assert {s["study_id"] for s in archive.studies().to_dict("records")} >= {study}
        assert empty not in set(archive.studies()["study_id"])
    assert _service_rows(path)["leases"] == 2


def test_export_import_and_merge_carry_history_but_not_the_service_tables(tmp_path):
    path = tmp_path / "served.duckdb"
    _served_archive(path)
    assert _service_rows(path) == {"leases": 3, "requests": 1}
    for args, target in ((("curate", "export", tmp_path / "store"), path),
                         (("curate", "import", tmp_path / "store"), tmp_path / "imported.duckdb"),
                         (("curate", "merge", path), tmp_path / "merged.duckdb")):
        result = run(*args, archive=target)
        assert result.exit_code == 0, (args, result.stderr)
    for target in ("imported.duckdb", "merged.duckdb"):
        result = run("studies", "--json", archive=tmp_path / target)
        assert_ok(result)
        assert sum(s["trial_count"] for s in json.loads(result.stdout)) == 3 * 24 + 2  # history: all of it
        # leases and request ids are promises of the service that owns an archive: they stay with it
        assert _service_rows(tmp_path / target) == {"leases": 0, "requests": 0}


def test_archive_turns_hold_the_file_only_during_a_call(tmp_path, space, small_frame):
    from warmstart.archive.store import Archive
    from warmstart.archive.turns import ArchiveTurns, open_archive

    path = tmp_path / "turns.duckdb"
    with Archive(path) as archive:
        study = archive.add_study(archive.add_task("invented", small_frame, "y"), "svm", space)
    turns = ArchiveTurns(path)
    config = space.sample(1, rng=3)[0]
    assert turns.record_trial(study, config, 0.5) == 1 and turns.record_trial(study, config, 0.25) == 2
    # DuckDB refuses a read-only connection to a file this process still holds read-write: none is left
    duckdb.connect(str(path), read_only=True).close()
    assert turns.study(study)["trial_count"] == 2
    with pytest.raises(AttributeError, match="passes on Archive methods only, not '_q'"):
        turns._q
    with pytest.raises(ValueError, match=r"wait must be a number of seconds >= 0, got -1"):
        open_archive(path, wait=-1)
