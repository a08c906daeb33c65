"""The DuckDB archive: schema, reopening, bad files, locking, verbatim names,
all-or-nothing writes, content keys and failed trials. Real DuckDB files only."""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import subprocess
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from warmstart.archive import SCHEMA_VERSION, Archive, fingerprint
from warmstart.errors import ArchiveError, ArchiveLockedError, SpaceError, WarmstartError
from warmstart.space import Space

PROFILE = {"log_rows": 4.0, "log_features": 1.1}  # given, so these tests need not profile data
TABLES = {"schema_version", "archive_info", "tasks", "profiles", "spaces", "studies", "trials",
          "leases", "requests", "gain_reports"}


def trial_frame(space: Space, n: int = 12, seed: int = 0) -> pd.DataFrame:
    """n valid configs of ``space`` (one column per parameter) plus a score."""
    configs = space.sample(n, rng=seed)
    frame = pd.DataFrame(configs, columns=space.names)
    frame["score"] = np.random.default_rng(seed).random(n)
    return frame


def new_study(archive: Archive, space: Space, frame: pd.DataFrame, task: str = "task-a", learner: str = "svm") -> int:
    task_id = archive.add_task(task, frame, "y", profile=PROFILE)
    return archive.add_study(task_id, learner, space)


# -- schema -------------------------------------------------------------------


def test_new_archive_has_the_schema(archive_path):
    with Archive(archive_path) as archive:
        assert archive.schema_version == SCHEMA_VERSION == 3
    con = duckdb.connect(str(archive_path), read_only=True)
    tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert TABLES <= tables
    rows = con.execute("SELECT version, applied_at, duckdb_version FROM schema_version").fetchall()
    assert [(r[0], r[2]) for r in sorted(rows)] == [(v, duckdb.__version__) for v in (1, 2, 3)]
    assert con.execute("SELECT count(*) FROM archive_info").fetchall() == [(1,)]
    con.close()


def test_reopen_keeps_everything_and_adds_no_schema_rows(archive_path, space, small_frame, table_dump):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        archive.add_trials(study, trial_frame(space))
        archive_id = archive.archive_id
    before = table_dump(archive_path)
    with Archive(archive_path) as archive:
        assert archive.archive_id == archive_id
        assert len(archive.trials(study)) == 12
    with Archive(archive_path, read_only=True) as archive:
        assert archive.studies()["trial_count"].tolist() == [12]
    assert table_dump(archive_path) == before


def test_empty_duckdb_file_becomes_an_archive(archive_path):
    archive_path.parent.mkdir(parents=True)
    duckdb.connect(str(archive_path)).close()
    with Archive(archive_path) as archive:
        assert archive.schema_version == SCHEMA_VERSION


def test_memory_archive():
    with Archive(":memory:") as archive:
        assert archive.studies().empty and archive.tasks().empty


def test_read_only_missing_file(tmp_path):
    with pytest.raises(ArchiveError, match=r"none\.duckdb: no archive here; create one with `warmstart init`"):
        Archive(tmp_path / "none.duckdb", read_only=True)
    assert not (tmp_path / "none.duckdb").exists()


def test_read_only_archive_refuses_writes(archive_path, space, small_frame):
    Archive(archive_path).close()
    with Archive(archive_path, read_only=True) as archive:
        with pytest.raises(ArchiveError, match="opened read-only; cannot write"):
            archive.add_task("t", small_frame, "y", profile=PROFILE)


def test_directory_is_not_an_archive(tmp_path):
    with pytest.raises(ArchiveError, match=r"is a directory; give the archive file"):
        Archive(tmp_path)


def test_file_that_is_not_duckdb(tmp_path):
    path = tmp_path / "notes.duckdb"
    path.write_text("these are my notes, not a database\n")
    for read_only in (False, True):
        with pytest.raises(ArchiveError, match=re.escape(str(path)) + r": not a warmstart archive \(the file is not a DuckDB database\)"):
            Archive(path, read_only=read_only)
    assert path.read_text() == "these are my notes, not a database\n"


def test_duckdb_file_that_is_not_an_archive(tmp_path, table_dump):
    path = tmp_path / "other.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE sales (region VARCHAR, amount DOUBLE)")
    con.execute("INSERT INTO sales VALUES ('north', 1.5)")
    con.close()
    before = table_dump(path)
    for read_only in (False, True):
        with pytest.raises(ArchiveError, match=r"other\.duckdb: a DuckDB database but not a warmstart archive \(no schema_version table; tables: \['sales'\]\)"):
            Archive(path, read_only=read_only)
    assert table_dump(path) == before


def test_archive_with_a_newer_schema(archive_path, space, small_frame, table_dump):
    with Archive(archive_path) as archive:
        new_study(archive, space, small_frame)
    con = duckdb.connect(str(archive_path))
    con.execute("INSERT INTO schema_version VALUES (?, now(), ?)", [SCHEMA_VERSION + 1, "9.9.9"])
    con.close()
    before = table_dump(archive_path)
    for read_only in (False, True):
        with pytest.raises(ArchiveError, match=r"schema version 4 is newer than this warmstart understands \(3\); upgrade warmstart"):
            Archive(archive_path, read_only=read_only)
    assert table_dump(archive_path) == before


def test_second_writer_gets_a_clear_error_and_changes_nothing(archive_path, space, small_frame, table_dump, held_open):
    with Archive(archive_path) as archive:
        new_study(archive, space, small_frame)
    before = table_dump(archive_path)
    with held_open(archive_path) as pid:
        for read_only in (False, True):
            with pytest.raises(ArchiveLockedError, match=re.escape(str(archive_path)) + rf": another process is writing to this archive \(held by process {pid}\).*nothing was changed"):
                Archive(archive_path, read_only=read_only)
    assert table_dump(archive_path) == before
    assert issubclass(ArchiveLockedError, ArchiveError) and issubclass(ArchiveError, WarmstartError)


# -- names stored verbatim -------------------------------------------------------

NASTY = [
    "Robert'); DROP TABLE tasks; --",
    'quote " and \' both',
    "semi;colon; DELETE FROM trials",
    "back\\slash \\' end",
    "ünïcødé ✓ 名前",
    "?; SELECT 1 --",
]


def test_names_with_quotes_semicolons_and_sql_are_stored_verbatim(archive_path, small_frame):
    space = Space.from_dict({"params": {
        NASTY[0]: {"type": "real", "low": 0.0, "high": 1.0},
        NASTY[1]: {"type": "choice", "choices": NASTY[2:] + [1, True]},
        NASTY[5]: {"type": "integer", "low": 1, "high": 9, "when": {NASTY[1]: [NASTY[3]]}},
    }})
    configs = [
        {NASTY[0]: 0.25, NASTY[1]: NASTY[3], NASTY[5]: 4},
        {NASTY[0]: 0.75, NASTY[1]: NASTY[4]},
        {NASTY[0]: 0.5, NASTY[1]: True},
    ]
    with Archive(archive_path) as archive:
        for i, name in enumerate(NASTY):
            task = archive.add_task(name, small_frame.assign(f1=small_frame["f1"] + i), "y", profile=PROFILE, source=name)
            study = archive.add_study(task, learner=name, space=space, metric=name, owner=name, tags={name: name})
            frame = pd.DataFrame(configs, columns=space.names).assign(score=[0.1, 0.2, 0.3], error=[name, None, None])
            archive.add_trials(study, frame)
            archive.record_trial(study, configs[0], 0.4)
        tasks = archive.tasks()
        assert tasks["name"].tolist() == NASTY
        assert tasks["source"].tolist() == NASTY
        studies = archive.studies()
        assert studies["task"].tolist() == NASTY
        assert studies["learner"].tolist() == NASTY
        assert studies["metric"].tolist() == NASTY
        assert studies["owner"].tolist() == NASTY
        assert [t for t in studies["tags"]] == [{n: n} for n in NASTY]
        for study, name in zip(studies["study_id"], NASTY):
            row = archive.study(int(study))
            assert row["space"] == space and row["space"].names == space.names
            trials = archive.trials(int(study))
            assert trials["config"].tolist() == configs + [configs[0]]
            assert [type(c[NASTY[1]]) for c in trials["config"]] == [str, str, bool, str]
            assert trials["error"].iloc[0] == name
    con = duckdb.connect(str(archive_path), read_only=True)
    tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert TABLES <= tables
    assert con.execute("SELECT count(*) FROM trials").fetchall() == [(4 * len(NASTY),)]
    con.close()


# -- all or nothing -------------------------------------------------------------


def _ingest(archive, space, frame, trials, task):
    return archive.ingest(trials, task=task, data=frame, target="y", learner="gbt", space=space, metric="auc")


def _fail_after(method):
    """A replacement for an Archive method that does the real work, then fails."""
    original = getattr(Archive, method)

    def broken(self, *args, **kwargs):
        original(self, *args, **kwargs)
        raise RuntimeError(f"injected failure after {method}")

    return broken


@pytest.mark.parametrize("method", ["add_study", "_insert_trials", "finish_study"])
def test_failure_halfway_through_an_ingest_leaves_the_archive_unchanged(
    archive_path, space, small_frame, table_dump, monkeypatch, method
):
    with Archive(archive_path) as archive:
        _ingest(archive, space, small_frame, trial_frame(space, seed=1), "first")
    before = table_dump(archive_path)
    other_data = small_frame.assign(f2=small_frame["f2"] * 2)
    with Archive(archive_path) as archive:
        with monkeypatch.context() as patch:
            patch.setattr(Archive, method, _fail_after(method))
            with pytest.raises(RuntimeError, match=f"injected failure after {method}"):
                _ingest(archive, space, other_data, trial_frame(space, seed=2), "second")
        assert table_dump(archive.con) == before  # rolled back in this session
        # the archive is still usable: the same ingest now goes through
        task_id, study_id, n = _ingest(archive, space, other_data, trial_frame(space, seed=2), "second")
        assert n == 12 and archive.trials(study_id)["number"].tolist() == list(range(1, 13))
    assert len(table_dump(archive_path)["trials"]) == 24


def test_crash_in_the_middle_of_an_ingest_leaves_the_archive_unchanged(archive_path, space, small_frame, table_dump):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        archive.add_trials(study, trial_frame(space, seed=1))
    trial_frame(space, n=500, seed=2).to_parquet(archive_path.parent / "more.parquet")
    before = table_dump(archive_path)
    # A real process inserts the trials, then dies without commit or rollback (os._exit).
    script = (
        "import os, sys, pandas as pd\n"
        "from warmstart.archive import Archive\n"
        "original = Archive._insert_trials\n"
        "def crash(self, *a, **k):\n"
        "    original(self, *a, **k)\n"
        "    os._exit(3)\n"
        "Archive._insert_trials = crash\n"
        "archive = Archive(sys.argv[1])\n"
        "archive.add_trials(1, pd.read_parquet(sys.argv[2]))\n"
    )
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.run(
        [sys.executable, "-c", script, str(archive_path), str(archive_path.parent / "more.parquet")],
        env=env, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 3, proc.stderr
    assert table_dump(archive_path) == before


def test_add_trials_with_a_bad_row_writes_nothing(archive_path, space, small_frame, table_dump):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        archive.add_trials(study, trial_frame(space))
        before = table_dump(archive.con)
        bad = trial_frame(space, n=50, seed=3)
        bad.loc[40, "depth"] = 99
        with pytest.raises(WarmstartError, match=r"rows: row 41, column 'depth': value 99 is out of range; integer in \[1, 8\]"):
            archive.add_trials(study, bad, where="rows")
        assert table_dump(archive.con) == before


def test_nested_transactions_join_the_outer_one(archive_path, space, small_frame, table_dump):
    with Archive(archive_path) as archive:
        before = table_dump(archive.con)
        with pytest.raises(ZeroDivisionError):
            with archive.transaction():
                new_study(archive, space, small_frame)
                1 / 0
        assert table_dump(archive.con) == before


# -- tasks -----------------------------------------------------------------------


def test_add_task_stores_fingerprint_shape_and_profile(archive_path, small_frame):
    with Archive(archive_path) as archive:
        task = archive.add_task("churn-north", small_frame, "y")
        row = archive.tasks().iloc[0]
        assert (row["name"], row["target"], row["kind"]) == ("churn-north", "y", "classification")
        assert (row["n_rows"], row["n_features"]) == (60, 3)
        assert row["fingerprint"] == fingerprint(small_frame, "y")
        profiles = archive.profiles()
        assert profiles.index.tolist() == [task] and "profile_version" in profiles
        assert np.isfinite(profiles.drop(columns="profile_version").to_numpy(dtype=float)).all()
        # the same name and data is the same task; the same name with other data is refused
        assert archive.add_task("churn-north", small_frame.copy(), "y") == task
        with pytest.raises(ArchiveError, match=r"task 'churn-north' already exists .* with different data .*choose another task name"):
            archive.add_task("churn-north", small_frame.assign(f1=0.0), "y")
        with pytest.raises(ArchiveError, match=r"target column 'label' not found; columns are \['f1', 'f2', 'f3', 'y'\]"):
            archive.add_task("other", small_frame, "label")


def test_fingerprint_depends_on_content_not_index(small_frame):
    fp = fingerprint(small_frame, "y")
    assert fp == fingerprint(small_frame.set_axis(range(100, 160)), "y")
    assert fp != fingerprint(small_frame.assign(f3=small_frame["f3"] + 1e-9), "y")
    assert fp != fingerprint(small_frame, "f1")
    assert re.fullmatch(r"[0-9a-f]{64}", fp)


# -- studies and trials ------------------------------------------------------------


def test_studies_study_and_trials(archive_path, space, small_frame):
    with Archive(archive_path) as archive:
        task = archive.add_task("t", small_frame, "y", profile=PROFILE)
        up = archive.add_study(task, "svm", space, metric="auc", maximize=True, owner="ana", tags={"team": "retail"})
        down = archive.add_study(task, "svm", space, metric="log_loss", maximize=False)
        archive.add_trials(up, trial_frame(space).assign(score=np.arange(12) / 10))
        archive.add_trials(down, trial_frame(space).assign(score=np.arange(12) / 10))
        studies = archive.studies()
        assert studies[["study_id", "metric", "direction", "trial_count"]].values.tolist() == [
            [up, "auc", "maximize", 12], [down, "log_loss", "minimize", 12]]
        assert studies["best_score"].tolist() == pytest.approx([1.1, 0.0])
        assert studies["space_id"].nunique() == 1  # same space stored once
        row = archive.study(up)
        assert row["space"] == space and row["maximize"] and row["prior"] is None
        assert row["tags"] == {"team": "retail"} and row["owner"] == "ana"
        trials = archive.trials(up)
        assert list(trials.columns) == ["number", "config", "score", "status", "cost_s", "started_at",
                                        "finished_at", "error", "content_key", "fold_scores"]
        assert trials["config"].tolist() == [space.normalize(c) for c in space.sample(12, rng=0)]
        table = archive.trial_table(up)
        assert list(table.columns[:1 + space.dim]) == ["number"] + space.names
        with pytest.raises(ArchiveError, match=r"no study with id 99 in .*`warmstart studies` lists them"):
            archive.study(99)
        with pytest.raises(ArchiveError, match=r"no task with id 42"):
            archive.add_study(42, "svm", space)
        with pytest.raises(ArchiveError, match=r"origin must be one of cold, warm, imported; got 'hot'"):
            archive.add_study(task, "svm", space, origin="hot")


def test_stored_config_is_the_canonical_config(archive_path, space, small_frame):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        configs = space.sample(40, rng=5) + [
            {"C": 1e-3, "tol": 0.0, "n_trees": 10, "depth": 1, "kernel": "poly", "degree": 2},
            {"C": 1e3, "tol": 0.5, "n_trees": 1000, "depth": 8, "kernel": "linear"},
            {"C": 1e-2 + 1e-17, "tol": 1 / 3, "n_trees": 999, "depth": 8, "kernel": "rbf"},
        ]
        archive.add_trials(study, pd.DataFrame(configs).assign(score=0.5))
        text = [r[0] for r in archive.con.execute("SELECT config FROM trials ORDER BY number").fetchall()]
    for t, config in zip(text, configs):
        parsed = json.loads(t)
        assert list(parsed) == sorted(parsed)  # keys sorted
        assert " " not in t  # compact
        assert parsed == space.normalize(config)  # every value exactly (floats round-trip)
        assert [type(v) for v in parsed.values()] == [type(space.normalize(config)[k]) for k in parsed]


def test_content_keys_agree_between_bulk_and_single_writes(archive_path, space, small_frame):
    configs = space.sample(6, rng=9)
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        archive.add_trials(study, pd.DataFrame(configs, columns=space.names).assign(score=0.5))
        for config in configs:
            archive.record_trial(study, dict(reversed(list(config.items()))), 0.7)
        again = archive.add_study(archive.task_id("task-a"), "svm", space)
        archive.record_trial(again, configs[0], 0.1)
        other_learner = archive.add_study(archive.task_id("task-a"), "forest", space)
        archive.record_trial(other_learner, configs[0], 0.1)
        other_task = new_study(archive, space, small_frame.assign(f1=1.0), task="task-b")
        archive.record_trial(other_task, configs[0], 0.1)
        keys = archive.trials(study)["content_key"].tolist()
        assert keys[:6] == keys[6:] and len(set(keys[:6])) == 6
        assert archive.trials(again)["content_key"].iloc[0] == keys[0]
        assert archive.trials(other_learner)["content_key"].iloc[0] != keys[0]
        assert archive.trials(other_task)["content_key"].iloc[0] != keys[0]
        # reference: hashlib.sha256 of "fingerprint|learner|config JSON" as stored
        fp = archive.tasks()["fingerprint"].iloc[0]
        text = archive.con.execute("SELECT config, content_key FROM trials WHERE study_id = ? ORDER BY number", [study]).fetchall()
        for config_text, key in text:
            assert key == hashlib.sha256(f"{fp}|svm|{config_text}".encode()).hexdigest()


def test_nan_and_inf_scores_become_failed_trials_with_null_score(archive_path, space, small_frame):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        frame = trial_frame(space, n=6)
        frame["score"] = [0.5, np.nan, np.inf, -np.inf, None, 0.25]
        frame["status"] = ["ok", "ok", "ok", None, "ok", "failed"]
        archive.add_trials(study, frame)
        config = space.sample(1, rng=1)[0]
        for score in (float("nan"), float("inf"), None):
            archive.record_trial(study, config, score)
        archive.record_trial(study, config, 0.9, status="failed", error="worker lost")
        rows = archive.con.execute(
            "SELECT number, score, status, error FROM trials WHERE study_id = ? ORDER BY number", [study]
        ).fetchall()
    assert rows[0][1:3] == (0.5, "ok")
    for number, score, status, error in rows[1:]:
        assert score is None and status == "failed", (number, score, status, error)
    # a missing or non-finite score says so; a trial marked failed keeps its own error (or none)
    assert [r[3] for r in rows[1:5] + rows[6:9]] == ["score is missing or not finite"] * 7
    assert rows[5][3] is None
    assert rows[-1][3] == "worker lost"


def test_nan_and_inf_scores_without_a_status_column(archive_path, space, small_frame):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        archive.add_trials(study, trial_frame(space, n=4).assign(score=[np.nan, np.inf, -np.inf, 0.5]))
        rows = archive.con.execute("SELECT score, status, error FROM trials ORDER BY number").fetchall()
    assert rows == [(None, "failed", "score is missing or not finite")] * 3 + [(0.5, "ok", None)]


def test_record_trial_numbers_and_validation(archive_path, space, small_frame, table_dump):
    with Archive(archive_path) as archive:
        study = new_study(archive, space, small_frame)
        config = {"C": 1.0, "tol": 0.1, "n_trees": 50, "depth": 3, "kernel": "rbf"}
        assert [archive.record_trial(study, config, s, cost_s=1.5) for s in (0.1, 0.2, 0.3)] == [1, 2, 3]
        assert archive.add_trials(study, trial_frame(space, n=4)) == 4
        assert archive.trials(study)["number"].tolist() == list(range(1, 8))
        before = table_dump(archive.con)
        with pytest.raises(SpaceError, match=r"parameter 'depth': value 0 is out of range; integer in \[1, 8\]"):
            archive.record_trial(study, dict(config, depth=0), 0.5)
        with pytest.raises(WarmstartError, match=r"column 'status': value 'done' is not a status; use one of \['ok', 'failed'\]"):
            archive.record_trial(study, config, 0.5, status="done")
        with pytest.raises(ArchiveError, match=r"no study with id 77"):
            archive.record_trial(77, config, 0.5)
        assert table_dump(archive.con) == before
        trial = archive.trials(study).iloc[0]
        assert trial["cost_s"] == 1.5 and not pd.isna(trial["finished_at"])
        assert math.isclose(trial["score"], 0.1)
