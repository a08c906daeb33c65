"""Schema version 2 (the service's leases, request ids and gain reports):
an archive of version 1 keeps working read-only and is upgraded in one
transaction when opened for writing. Real DuckDB files only."""

from __future__ import annotations

from importlib import resources

import duckdb
import numpy as np
import pandas as pd
import pytest

from warmstart.archive import SCHEMA_VERSION, Archive
from warmstart.errors import ArchiveError

PROFILE = {"log_rows": 4.0, "log_features": 1.1}
V2_TABLES = {"leases", "requests", "gain_reports"}


def _tables(path) -> set[str]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        return {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    finally:
        con.close()


def _version_1_archive(path, space, frame) -> None:
    """An archive as warmstart wrote it before version 2: schema_v1.sql alone, plus one study."""
    path.parent.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect(str(path))
    sql = resources.files("warmstart.archive").joinpath("schema_v1.sql").read_text()
    lines = [line for line in sql.splitlines() if not line.strip().startswith("--")]
    for statement in "\n".join(lines).split(";"):
        if statement.strip():
            con.execute(statement)
    con.execute("INSERT INTO schema_version VALUES (1, now(), ?)", [duckdb.__version__])
    con.execute("INSERT INTO archive_info VALUES ('v1archive', now())")
    con.close()
    # fill it through the tables of version 1 only: copy rows written by a current archive
    with Archive(":memory:") as scratch:
        task = scratch.add_task("task-a", frame, "y", profile=PROFILE)
        study = scratch.add_study(task, "svm", space)
        configs = space.sample(5, rng=0)
        trials = pd.DataFrame(configs, columns=space.names).assign(score=np.linspace(0.1, 0.5, 5))
        scratch.add_trials(study, trials)
        # trials.fold_scores came with version 3: a version-1 file has none
        rows = {t: scratch.con.execute(f"SELECT * {'EXCLUDE (fold_scores) ' if t == 'trials' else ''}FROM {t}").fetchall()
                for t in ("tasks", "profiles", "spaces", "studies", "trials")}
    con = duckdb.connect(str(path))
    for table, values in rows.items():
        for row in values:
            con.execute(f"INSERT INTO {table} VALUES ({', '.join('?' * len(row))})", list(row))
    con.execute("DROP SEQUENCE task_ids")
    con.execute("CREATE SEQUENCE task_ids START 2")
    con.execute("DROP SEQUENCE study_ids")
    con.execute("CREATE SEQUENCE study_ids START 2")
    con.execute("DROP SEQUENCE space_ids")
    con.execute("CREATE SEQUENCE space_ids START 2")
    con.close()


def test_version_1_archive_is_read_without_migrating(archive_path, space, small_frame, table_dump):
    _version_1_archive(archive_path, space, small_frame)
    before = table_dump(archive_path)
    with Archive(archive_path, read_only=True) as archive:
        assert archive.schema_version == 1
        assert archive.studies()["trial_count"].tolist() == [5]
    assert table_dump(archive_path) == before
    assert not V2_TABLES & _tables(archive_path)


def test_version_1_archive_is_upgraded_when_opened_for_writing(archive_path, space, small_frame, table_dump):
    _version_1_archive(archive_path, space, small_frame)
    before = table_dump(archive_path)
    with Archive(archive_path) as archive:
        assert archive.schema_version == SCHEMA_VERSION == 3
        assert archive.archive_id == "v1archive"  # not a new archive: the id stays
    after = table_dump(archive_path)
    for table, rows in before.items():
        if table == "trials":  # version 3 appends fold_scores, empty for trials written before it
            assert all(r.endswith(", None)") for r in after[table])
            assert [r[: -len(", None)")] + ")" for r in after[table]] == rows
        elif table != "schema_version":
            assert after[table] == rows, table
    assert V2_TABLES <= _tables(archive_path)
    con = duckdb.connect(str(archive_path), read_only=True)
    assert [r[0] for r in con.execute("SELECT version FROM schema_version ORDER BY version").fetchall()] == [1, 2, 3]
    con.close()
    with Archive(archive_path) as archive:  # a second open adds nothing
        archive.add_trials(1, pd.DataFrame(space.sample(1, rng=9), columns=space.names).assign(score=0.9))
        assert archive.studies()["trial_count"].tolist() == [6]
    con = duckdb.connect(str(archive_path), read_only=True)
    assert con.execute("SELECT count(*) FROM schema_version").fetchall() == [(3,)]
    con.close()


def test_a_failed_upgrade_leaves_version_1_as_it_was(archive_path, space, small_frame, table_dump, monkeypatch):
    """The upgrade is one transaction: a step that fails leaves no table of version 2 behind."""
    from warmstart.archive import store

    _version_1_archive(archive_path, space, small_frame)
    before = table_dump(archive_path)
    broken = dict(store.MIGRATIONS)
    broken[2] = "schema_v1.sql"  # re-running version 1 fails on its first CREATE (the table exists)
    monkeypatch.setattr(store, "MIGRATIONS", broken)
    with pytest.raises(duckdb.CatalogException, match="already exists"):
        Archive(archive_path)
    assert table_dump(archive_path) == before


def test_a_version_0_file_is_refused_read_only(archive_path):
    """An empty DuckDB file is no archive to read (READABLE_FROM is 1)."""
    archive_path.parent.mkdir(parents=True)
    duckdb.connect(str(archive_path)).close()
    with pytest.raises(ArchiveError, match="empty database, not a warmstart archive"):
        Archive(archive_path, read_only=True)
