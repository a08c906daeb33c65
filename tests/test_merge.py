"""`curate merge`, `curate export` and `curate import` on real DuckDB files.

Outside references: pandas ``drop_duplicates`` for the set of distinct trials
a merge must end with; DuckDB's own Parquet reader with hive partitioning and
``pyarrow.parquet`` for the exported store (what a teammate would use);
``hashlib.sha256`` of the other archive's bytes to show a merge only reads it.
The data is invented (random numbers, fixed seeds).
"""

from __future__ import annotations

import hashlib
import json
import tempfile
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_curate import NASTY_LEARNER, NASTY_TASK, SPACE, add_study, cli, make_data, make_trials

from warmstart.archive import SCHEMA_VERSION, Archive
from warmstart.archive.curate import archive_digest, check_archive, count_duplicates
from warmstart.archive.transfer import export_archive, import_export, merge_archive
from warmstart.errors import ArchiveError
from warmstart.space import Space

GBT_SPACE = Space.from_dict({"params": {"depth": {"type": "integer", "low": 1, "high": 8},
                                        "rate": {"type": "real", "low": 0.01, "high": 1.0, "log": True}}})
IDENTITY = ["content_key", "metric", "direction", "status", "score"]


def identities(archive: Archive) -> pd.DataFrame:
    return archive.con.execute(
        "SELECT t.content_key, s.metric, s.direction, t.status, t.score FROM trials t JOIN studies s USING (study_id)"
    ).df()


@pytest.fixture
def pair(tmp_path) -> tuple[Path, Path]:
    """Archive A, and a teammate's archive B overlapping it in known ways."""
    a, b = tmp_path / "a.duckdb", tmp_path / "b.duckdb"
    t1 = make_trials(1, 12)
    with Archive(a) as archive:
        add_study(archive, "churn", 1, t1, owner="ana")
        add_study(archive, "stores", 2, make_trials(2, 8))
    with Archive(b) as archive:
        add_study(archive, "churn", 1, t1, owner="ben")  # the same trials: already here
        add_study(archive, "stores", 3, make_trials(3, 6), tags={"site": "north"})  # same name, other data
        add_study(archive, "churn", 1, pd.concat([t1.head(4), make_trials(4, 5)]))  # 4 of 9 already here
        add_study(archive, "basket", 4, make_trials(5, 7, GBT_SPACE), learner="gbt", space=GBT_SPACE)
        task = archive.task_id("basket")
        archive.add_study(task, "gbt", GBT_SPACE)  # no trials: skipped
    return a, b


def test_merge_brings_in_what_is_new_and_counts_what_was_there(pair):
    a, b = pair
    with Archive(b, read_only=True) as other:
        theirs, b_id = identities(other), other.archive_id
    with Archive(a) as archive:
        ours = identities(archive)
        summary = merge_archive(archive, b)
        assert (summary.tasks_new, summary.tasks_matched) == (2, 1)
        assert (summary.spaces_new, summary.spaces_matched) == (1, 1)
        assert (summary.studies_new, summary.studies_grown, summary.studies_already_here) == (3, 0, 1)
        assert summary.studies_skipped == 1
        assert (summary.trials_new, summary.trials_already_here) == (6 + 5 + 7, 12 + 4)
        assert summary.renamed == (("stores", f"stores (from {b_id[:8]})"),)
        # reference: pandas drop_duplicates over both archives' trial identities
        union = pd.concat([ours, theirs]).drop_duplicates(IDENTITY)
        merged = identities(archive)
        assert len(merged) == len(union) == len(merged.drop_duplicates(IDENTITY))
        assert count_duplicates(archive) == 0 and check_archive(archive).ok
        studies = archive.studies().set_index("study_id")
        assert studies["task"].tolist() == ["churn", "stores", f"stores (from {b_id[:8]})", "churn", "basket"]
        assert studies.loc[3, "tags"] == {"site": "north"} and studies.loc[1, "owner"] == "ana"
        provenance = archive.con.execute(
            "SELECT study_id, source_archive, merged_at IS NOT NULL FROM studies ORDER BY study_id").fetchall()
        assert provenance == [(1, None, False), (2, None, False)] + [(i, b_id, True) for i in (3, 4, 5)]
        assert archive.trials(4)["number"].tolist() == [5, 6, 7, 8, 9]  # its own numbers, 1-4 were here
    assert "renamed: task 'stores' holds other data here" in "\n".join(summary.lines())


def test_merging_twice_adds_nothing_and_never_writes_the_other_file(pair):
    a, b = pair
    before_b = hashlib.sha256(b.read_bytes()).hexdigest()
    result = cli(a, "curate", "merge", b)
    assert result.exit_code == 0, result.output
    assert "trials:  18 new, 16 already here" in result.stdout
    with Archive(a, read_only=True) as archive:
        first = archive_digest(archive)
    result = cli(a, "curate", "merge", b, "--json")
    summary = json.loads(result.stdout)
    assert (summary["trials_new"], summary["studies_new"], summary["tasks_new"]) == (0, 0, 0)
    assert summary["trials_already_here"] == 34
    with Archive(a, read_only=True) as archive:
        assert archive_digest(archive) == first
    assert hashlib.sha256(b.read_bytes()).hexdigest() == before_b
    assert not Path(str(b) + ".wal").exists()


def test_a_study_grown_since_the_last_merge_gets_only_its_new_trials(pair):
    a, b = pair
    with Archive(a) as archive:
        merge_archive(archive, b)
    with Archive(b) as other:
        other.record_trial(2, SPACE.sample(1, rng=99)[0], 0.75)  # B's "stores" study ran one more trial
    with Archive(a) as archive:
        summary = merge_archive(archive, b)
        assert (summary.studies_grown, summary.studies_new, summary.trials_new) == (1, 0, 1)
        grown = archive.trials(3)
        assert grown["number"].tolist() == list(range(1, 8)) and grown["score"].iloc[-1] == 0.75
        assert not merge_archive(archive, b).changed


def test_merge_takes_the_current_profile_of_a_task_known_here_with_an_old_one(pair):
    a, b = pair
    with Archive(a) as archive:
        archive.con.execute("UPDATE profiles SET version = '0', value = -1 WHERE task_id = 1")
        summary = merge_archive(archive, b)
        assert summary.profiles_updated == 1
        assert archive.profiles().loc[1, "log_rows"] == 1.0  # B's value (given as the data seed)


def _fill(archive: Archive, rows: list, pool: list) -> None:
    """One study per (task, study) group of rows; tasks 0-2 share data across archives."""
    groups: dict = {}
    for task, study, config, score in rows:
        groups.setdefault((task, study), []).append({**pool[config], "score": score})
    for (task, _), trials in sorted(groups.items()):
        task_id = archive.add_task(f"task {task}", make_data(task), "y", profile={"log_rows": 1.0})
        archive.add_trials(archive.add_study(task_id, "svm", SPACE), pd.DataFrame(trials))


_rows = st.lists(st.tuples(st.integers(0, 2), st.integers(0, 1), st.integers(0, 4),
                           st.sampled_from([0.5, 0.75, float("nan")])), max_size=12)


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_rows, _rows)
def test_merge_ends_with_the_union_of_distinct_trials_and_is_idempotent(ours, theirs):
    pool = SPACE.sample(5, rng=3)
    with tempfile.TemporaryDirectory() as folder:
        a, b = Path(folder) / "a.duckdb", Path(folder) / "b.duckdb"
        with Archive(b) as other:
            _fill(other, theirs, pool)
            incoming = identities(other)
        with Archive(a) as archive:
            _fill(archive, ours, pool)
            before = identities(archive)
            summary = merge_archive(archive, b)
            after = identities(archive)
            # reference: Python sets of (content key, metric, direction, status, score)
            key = lambda frame: {tuple("nan" if v != v else v for v in row) for row in frame.itertuples(index=False)}
            assert key(after) == key(before) | key(incoming)
            assert len(after) == len(before) + len(key(incoming) - key(before)) == len(before) + summary.trials_new
            assert summary.trials_new + summary.trials_already_here == len(incoming)
            digest = archive_digest(archive)
            assert not merge_archive(archive, b).changed and archive_digest(archive) == digest


# -- export / import -------------------------------------------------------------------
@pytest.fixture
def varied(tmp_path) -> Path:
    """An archive with three learners, one named with quotes and shell characters."""
    path = tmp_path / "v.duckdb"
    with Archive(path) as archive:
        add_study(archive, NASTY_TASK, 1, make_trials(1, 9), learner=NASTY_LEARNER, owner="ana", tags={"k": "v"})
        add_study(archive, "stores", 2, make_trials(2, 5, GBT_SPACE), learner="a/b=c", space=GBT_SPACE)
        add_study(archive, "stores", 2, make_trials(3, 4, GBT_SPACE), learner="123", space=GBT_SPACE)
        archive.record_trial(1, SPACE.sample(1, rng=4)[0], None, error="worker lost")
    return path


def canonical(archive: Archive) -> dict:
    """Every table with ids replaced by names, so two archives can be compared."""
    sql = {
        "tasks": "SELECT * EXCLUDE (task_id) FROM tasks",
        "profiles": "SELECT k.fingerprint, p.feature, p.value, p.version FROM profiles p JOIN tasks k USING (task_id)",
        "spaces": "SELECT * EXCLUDE (space_id) FROM spaces",
        "studies": "SELECT k.name, s.* EXCLUDE (study_id, task_id, space_id, source_archive, merged_at) "
                   "FROM studies s JOIN tasks k USING (task_id)",
        "trials": "SELECT t.* EXCLUDE (study_id), s.created_at AS study FROM trials t JOIN studies s USING (study_id)",
    }
    return {name: sorted(map(repr, archive.con.execute(q).fetchall())) for name, q in sql.items()}


def test_export_is_a_hive_partitioned_store_that_plain_duckdb_reads(varied, tmp_path):
    out = tmp_path / "store"
    with Archive(varied, read_only=True) as archive:
        manifest = export_archive(archive, out)
        studies = archive.studies()
        assert manifest["archive_id"] == archive.archive_id
    assert manifest["schema_version"] == SCHEMA_VERSION and manifest["format"] == "warmstart-export"
    assert manifest["counts"] == {"tasks": 2, "profiles": 2, "spaces": 3, "studies": 3, "trials": 19}
    assert json.loads((out / "manifest.json").read_text()) == manifest
    assert len(list((out / "trials").glob("learner=*"))) == 3
    # reference: DuckDB's own Parquet reader, as a teammate would query the store (README)
    con = duckdb.connect()
    rows = con.execute(
        "SELECT learner, count(*) AS n, count(*) FILTER (WHERE status = 'failed') AS failed "
        "FROM read_parquet(?, hive_partitioning = true, hive_types = {'learner': VARCHAR}) "
        "GROUP BY learner ORDER BY learner",
        [str(out / "trials" / "**" / "*.parquet")],
    ).fetchall()
    expected = studies.groupby("learner")[["trial_count"]].sum().sort_index()
    assert [(r[0], r[1]) for r in rows] == list(expected["trial_count"].items())
    assert dict((r[0], r[2]) for r in rows)[NASTY_LEARNER] == 1
    # reference: pyarrow reads the task table
    assert sorted(pq.read_table(out / "tasks.parquet").column("name").to_pylist()) == sorted([NASTY_TASK, "stores"])


def test_export_then_import_restores_every_row_and_importing_again_adds_nothing(varied, tmp_path):
    out, fresh = tmp_path / "store", tmp_path / "fresh.duckdb"
    result = cli(varied, "curate", "export", out)
    assert result.exit_code == 0, result.output
    assert "19 trials" in result.stdout
    result = cli(fresh, "curate", "import", out)
    assert result.exit_code == 0, result.output
    assert "trials:  19 new, 0 already here" in result.stdout
    with Archive(varied, read_only=True) as original, Archive(fresh) as copy:
        assert canonical(copy) == canonical(original)
        before = archive_digest(copy)
        assert not import_export(copy, out).changed
        assert archive_digest(copy) == before
    with Archive(varied) as original:
        before = archive_digest(original)
        summary = import_export(original, out)
        assert summary.trials_already_here == 19 and not summary.changed
        assert archive_digest(original) == before


def test_export_never_overwrites_and_leaves_no_half_store(varied, tmp_path):
    out = tmp_path / "store"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    with Archive(varied, read_only=True) as archive:
        with pytest.raises(ArchiveError, match="already exists and is not an empty directory"):
            export_archive(archive, out)
        empty = tmp_path / "empty"
        empty.mkdir()
        assert export_archive(archive, empty)["counts"]["trials"] == 19
    assert (out / "keep.txt").read_text() == "mine" and sorted(p.name for p in out.iterdir()) == ["keep.txt"]
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".warmstart-export-")]


def test_duckdb_progress_bar_is_off_so_json_output_stays_json(pair):
    """DuckDB draws a progress bar on stdout for queries over ~2 s (seen on a 1M-trial
    merge, where it broke `--json`); the archive's connection turns it off."""
    a, _ = pair
    with Archive(a, read_only=True) as archive:
        assert archive.con.execute("SELECT current_setting('enable_progress_bar')").fetchall() == [(False,)]
