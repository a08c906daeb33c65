"""`curate merge`, `curate export` and `curate import` on real DuckDB files.

Outside references: pandas ``drop_duplicates`` for the distinct trials of two
archives without repeats; for random archives with repeated evaluations and
studies copied between them, a plain-Python reference of the duplicate rule
(``collections.Counter`` multisets per study, ``expected_merge``) and
``curate``'s own duplicate count; DuckDB's own Parquet reader with hive
partitioning and ``pyarrow.parquet`` for the exported store (what a teammate
would use); ``hashlib.sha256`` of the other archive's bytes to show a merge
only reads it. The data is invented (random numbers, fixed seeds; the task
names and the "ferry delays" team scenario are fictional).
"""

from __future__ import annotations

import hashlib
import json
import shutil
import tempfile
from collections import Counter, defaultdict
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from test_curate import NASTY_LEARNER, NASTY_TASK, SPACE, add_study, cli, make_data, make_trials

from warmstart.archive import SCHEMA_VERSION, Archive
from warmstart.archive.curate import archive_digest, check_archive, count_duplicates
from warmstart.archive.exchange import export_archive, import_export
from warmstart.archive.merge import MERGE_STEPS, merge_archive
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


# -- the merge rule against a plain-Python reference (multisets per study) ----------------
START = datetime(2024, 3, 1, 9, 0)  # invented study start times: START + n minutes
SCORES = [0.5, 0.75, None]  # None: a failed trial


def snapshot(archive: Archive) -> tuple[dict, list]:
    """Studies (id -> what makes two the same study) and trials (study, config, score, status), read as stored."""
    studies = {row[0]: tuple(row[1:]) for row in archive.con.execute(
        "SELECT s.study_id, k.fingerprint, s.learner, p.content_hash, s.metric, s.direction, s.created_at "
        "FROM studies s JOIN tasks k ON k.task_id = s.task_id JOIN spaces p ON p.space_id = s.space_id").fetchall()}
    trials = archive.con.execute(
        "SELECT study_id, config, score, status FROM trials ORDER BY study_id, number").fetchall()
    return studies, trials


def per_study(snap: tuple[dict, list]) -> dict[int, Counter]:
    """Each study's trials as a multiset of (config JSON, score, status)."""
    studies, trials = snap
    out = {sid: Counter() for sid in studies}
    for sid, config, score, status in trials:
        out[sid][(config, score, status)] += 1
    return out


def expected_merge(here: tuple[dict, list], theirs: tuple[dict, list]) -> tuple[dict[int, Counter], list, int]:
    """What the duplicate rule says a merge of ``theirs`` into ``here`` ends with, in plain Python.

    A trial's identity is (task fingerprint, learner, config, metric, direction, status, score).
    A copy of another study's trial is a duplicate; repeats inside one study all count.
    Identity held here: only its earliest study here (by start time, then id) can gain copies,
    from the source study that is that same study (equal fingerprint, learner, space hash,
    metric, direction and start time; equals paired in id order), as many as the source study
    has beyond the count here. Identity not held here: every copy of the earliest source study
    holding it, none from later ones. Returns the studies here (id -> multiset), the new
    studies as sorted (same-study key, multiset) pairs, and how many studies here grew.
    """
    (here_studies, here_trials), (src_studies, src_trials) = here, theirs

    def ranked(studies: dict) -> dict:
        seen: Counter = Counter()
        out = {}
        for sid in sorted(studies):
            seen[studies[sid]] += 1
            out[(studies[sid], seen[studies[sid]])] = sid
        return out

    here_by_key = ranked(here_studies)
    same = {sid: here_by_key.get(key) for key, sid in ranked(src_studies).items()}

    def identity(studies: dict, sid: int, config: str, score, status: str) -> tuple:
        fingerprint, learner, _, metric, direction, _ = studies[sid]
        return fingerprint, learner, config, metric, direction, status, score

    before = per_study(here)
    after = {sid: Counter(c) for sid, c in before.items()}
    keeper: dict = {}  # identity -> (start time, study id) of the earliest study here holding it
    for sid, config, score, status in here_trials:
        v, rank = identity(here_studies, sid, config, score, status), (here_studies[sid][-1], sid)
        keeper[v] = min(keeper.get(v, rank), rank)
    first_source: dict = {}
    incoming: dict = defaultdict(Counter)
    for sid, config, score, status in src_trials:
        v, rank = identity(src_studies, sid, config, score, status), (src_studies[sid][-1], sid)
        first_source[v] = min(first_source.get(v, rank), rank)
        incoming[sid][v] += 1
    new, grown = [], 0
    for sid in sorted(incoming):
        target, add = same[sid], Counter()
        for v, n in incoming[sid].items():
            row = (v[2], v[6], v[5])  # (config, score, status)
            if v in keeper:
                if keeper[v][1] == target:
                    add[row] = max(0, n - before[target][row])
            elif first_source[v][1] == sid:
                add[row] = n
        add = +add
        if add and target is None:
            new.append((src_studies[sid], add))
        elif add:
            after[target] += add
            grown += 1
    return after, sorted(new, key=repr), grown


def repeats_inside_studies(multisets) -> int:
    """Trials repeating an identical trial of their own study (what `curate check` notes)."""
    return sum(n - 1 for c in multisets for n in c.values() if n > 1)


_trial = st.tuples(st.integers(0, 7), st.sampled_from(SCORES))  # (config of a pool of 8, score)
_study = st.fixed_dictionaries({
    "task": st.integers(0, 3),  # tasks 0-3 hold the same data in both archives
    "start": st.integers(0, 3),  # equal start and task: the same study (two sessions' equal keys collide)
    "copy_start": st.integers(0, 7),  # where "copy": the other archive's copy is a separate study
    "where": st.sampled_from(["ours", "theirs", "both", "copy"]),
    "common": st.lists(_trial, max_size=5),
    "again": st.integers(0, 3),  # the first `again` common trials are evaluated a second time
    "ours": st.lists(_trial, max_size=3),
    "theirs": st.lists(_trial, max_size=3),
})


def _build(archive: Archive, specs: list, side: str, pool: list) -> None:
    """Studies of ``side`` ("ours"/"theirs"): "both" puts the same study (same start) in the two
    archives, each copy with its own extra trials; "copy" puts the trials in a separate study."""
    for spec in specs:
        if spec["where"] not in (side, "both", "copy"):
            continue
        trials = spec["common"] + spec["common"][: spec["again"]] + spec[side]
        start = spec["copy_start"] if spec["where"] == "copy" and side == "theirs" else spec["start"]
        task = archive.add_task(f"task {spec['task']}", make_data(spec["task"]), "y", profile={"log_rows": 1.0})
        study = archive.add_study(task, "svm", SPACE)
        archive.con.execute("UPDATE studies SET created_at = ? WHERE study_id = ?",
                            [START + timedelta(minutes=start), study])
        if trials:
            rows = [{**pool[c], "score": float("nan") if s is None else s} for c, s in trials]
            archive.add_trials(study, pd.DataFrame(rows))


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(_study, max_size=6), st.booleans())
def test_merge_keeps_repeated_evaluations_and_follows_the_duplicate_rule(specs, via_export):
    pool = SPACE.sample(8, rng=3)
    with tempfile.TemporaryDirectory() as folder:
        a, b = Path(folder) / "a.duckdb", Path(folder) / "b.duckdb"
        with Archive(b) as other:
            _build(other, specs, "theirs", pool)
            theirs = snapshot(other)
            if via_export:
                export_archive(other, Path(folder) / "store")
        bring = (lambda archive: import_export(archive, Path(folder) / "store")) if via_export else \
            (lambda archive: merge_archive(archive, b))
        with Archive(a) as archive:
            _build(archive, specs, "ours", pool)
            here = snapshot(archive)
            duplicates_before = count_duplicates(archive)
            summary = bring(archive)
            got = per_study(snapshot(archive))
            want, want_new, grown = expected_merge(here, theirs)
            assert {sid: got[sid] for sid in here[0]} == want
            studies_after = snapshot(archive)[0]
            new = sorted(((studies_after[sid], got[sid]) for sid in got if sid not in here[0]), key=repr)
            assert new == want_new
            added = sum(sum(c.values()) for c in want.values()) - len(here[1]) + sum(
                sum(c.values()) for _, c in want_new)
            assert summary.trials_new == added and summary.trials_already_here == len(theirs[1]) - added
            assert (summary.studies_new, summary.studies_grown) == (len(want_new), grown)
            # what the example exercised (pytest --hypothesis-show-statistics)
            event(f"same studies grown: {min(grown, 1)}")
            brought = repeats_inside_studies(got.values()) - repeats_inside_studies(per_study(here).values())
            event(f"repeated evaluations brought in: {min(brought, 1)}")
            event(f"copies of trials here skipped: {min(summary.trials_already_here, 1)}")
            # curate's own duplicate count is unchanged: a merge adds no copy of another study's trial
            assert count_duplicates(archive) == duplicates_before
            notes = check_archive(archive).notes
            assert notes["repeated_evaluations_same_result"] == repeats_inside_studies(got.values())
            digest = archive_digest(archive)
            assert not bring(archive).changed and archive_digest(archive) == digest  # idempotent


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


# -- repeated evaluations inside a study, equal study keys, all-or-nothing ------------------
def test_merge_keeps_repeats_inside_a_study_and_check_then_finds_no_duplicates(tmp_path):
    """Invented scenario: a teammate evaluated two configs of a "ferry delays" study twice each
    (to see the noise); one config of that study copies a trial already here."""
    a, b = tmp_path / "a.duckdb", tmp_path / "b.duckdb"
    ours, theirs = make_trials(1, 4), make_trials(2, 5)
    with Archive(a) as archive:
        add_study(archive, "ferry delays", 1, ours)
    with Archive(b) as other:
        add_study(other, "ferry delays", 1, pd.concat([ours.head(1), theirs, theirs.head(2)]))
        export_archive(other, tmp_path / "store")
    shutil.copyfile(a, tmp_path / "a2.duckdb")
    result = cli(a, "curate", "merge", b)
    assert result.exit_code == 0, result.output
    assert "trials:  7 new, 1 already here" in result.stdout  # 5 configs + 2 repeats; the copy is here
    with Archive(a, read_only=True) as archive:
        merged = archive.trials(2)
        assert merged["number"].tolist() == [2, 3, 4, 5, 6, 7, 8]
        assert merged["score"].tolist() == theirs["score"].tolist() + theirs["score"].head(2).tolist()
    check = cli(a, "curate", "check")
    assert check.exit_code == 0 and "archive is sound" in check.stdout
    assert "note: 2 trial(s) repeat a config of their own study" in check.stdout
    report = json.loads(cli(a, "curate", "check", "--json").stdout)
    assert {f["check"]: f["count"] for f in report["findings"]}["duplicate_trials"] == 0
    assert report["notes"]["repeated_evaluations_same_result"] == 2
    # import is a merge: the same rows from the Parquet store
    imported = cli(tmp_path / "a2.duckdb", "curate", "import", tmp_path / "store")
    assert imported.exit_code == 0 and "trials:  7 new, 1 already here" in imported.stdout
    with Archive(a, read_only=True) as merged, Archive(tmp_path / "a2.duckdb", read_only=True) as copy:
        assert canonical(copy) == canonical(merged)


def test_a_repeat_recorded_after_the_last_merge_comes_in_as_one_more_trial(tmp_path):
    a, b = tmp_path / "a.duckdb", tmp_path / "b.duckdb"
    trials = make_trials(3, 4)
    with Archive(b) as other:
        study = add_study(other, "ferry delays", 1, pd.concat([trials, trials.head(1)]))
    with Archive(a) as archive:
        assert merge_archive(archive, b).trials_new == 5
    with Archive(b) as other:
        second = other.trials(study).iloc[1]
        other.record_trial(study, second["config"], second["score"])  # config 2 run again, same score
        other.record_trial(study, second["config"], 0.123)  # and once more, another score
    with Archive(a) as archive:
        summary = merge_archive(archive, b)
        assert (summary.studies_grown, summary.studies_new, summary.trials_new) == (1, 0, 2)
        assert archive.trials(1)["number"].tolist() == [1, 2, 3, 4, 5, 6, 7]
        assert archive.trials(1)["score"].tolist()[-2:] == [second["score"], 0.123]
        assert count_duplicates(archive) == 0
        digest = archive_digest(archive)
        assert not merge_archive(archive, b).changed and archive_digest(archive) == digest


def test_studies_with_equal_keys_are_paired_one_to_one_so_merging_again_adds_nothing(tmp_path):
    """Two studies of one task, learner, space and metric started at the same instant: the
    first holds config A, the second A twice and B. A is the first study's, so the second
    study's copies of it are duplicates (as `curate dedupe` would say of the source itself)."""
    a, b = tmp_path / "a.duckdb", tmp_path / "b.duckdb"
    t = make_trials(4, 2)
    with Archive(b) as other:
        add_study(other, "ferry delays", 1, t.head(1))
        add_study(other, "ferry delays", 1, pd.concat([t.head(1), t.head(1), t.tail(1)]))
        other.con.execute("UPDATE studies SET created_at = ?", [START])
    with Archive(a) as archive:
        assert merge_archive(archive, b).trials_new == 2
        scores = {sid: archive.trials(sid)["score"].tolist() for sid in (1, 2)}
        assert scores == {1: t["score"].head(1).tolist(), 2: t["score"].tail(1).tolist()}
        assert count_duplicates(archive) == 0
        digest = archive_digest(archive)
        again = merge_archive(archive, b)
        assert not again.changed and again.studies_already_here == 2 and archive_digest(archive) == digest


@pytest.mark.parametrize("failing_step", MERGE_STEPS)
def test_a_merge_interrupted_at_any_step_leaves_the_archive_as_it_was(pair, failing_step):
    a, b = pair

    def progress(step: str) -> None:
        if step == failing_step:
            raise KeyboardInterrupt  # what Ctrl-C raises; tasks and spaces are written before "insert"

    with Archive(a) as archive:
        before = archive_digest(archive)
        with pytest.raises(KeyboardInterrupt):
            merge_archive(archive, b, progress)
        assert archive_digest(archive) == before
        assert merge_archive(archive, b).trials_new == 18  # the connection is still usable


def _import_edited(pair, varied, tmp_path, file_of, select: str, message: str) -> None:
    """Export ``varied``, rewrite one of its Parquet files through ``select`` (on ``read_parquet``),
    and check that importing it into the first archive of ``pair`` fails with ``message`` and
    changes nothing."""
    out = tmp_path / "store"
    with Archive(varied, read_only=True) as archive:
        export_archive(archive, out)
    part = file_of(out)
    con = duckdb.connect()
    con.execute(f"COPY ({select} FROM read_parquet(?, hive_partitioning = false)) TO ? (FORMAT parquet)",
                [str(part), str(tmp_path / "edited.parquet")])
    con.close()
    shutil.move(tmp_path / "edited.parquet", part)
    a, _ = pair
    with Archive(a) as archive:
        before = archive_digest(archive)
        with pytest.raises(ArchiveError, match=message):
            import_export(archive, out)
        assert archive_digest(archive) == before


def test_an_import_with_a_value_the_archive_refuses_names_file_column_and_value(pair, varied, tmp_path):
    # a trial file edited by hand: one status the archive's CHECK constraint refuses; it is named
    # before anything is inserted (rollback at every later step: the interrupted-merge test above)
    _import_edited(pair, varied, tmp_path, lambda out: sorted((out / "trials").rglob("*.parquet"))[0],
                   "SELECT * REPLACE (CASE WHEN number = 1 THEN 'lost' ELSE status END AS status)",
                   r"trials: column 'status' holds 'lost' on 1 row\(s\); valid values are \['ok', 'failed'\]; "
                   r"nothing was changed")


def test_an_import_with_a_required_value_missing_names_file_and_column(pair, varied, tmp_path):
    # the schema (schema_v1.sql) makes a study's metric NOT NULL; an edited export without it is
    # refused by name before anything is inserted
    _import_edited(pair, varied, tmp_path, lambda out: out / "studies.parquet",
                   "SELECT * REPLACE (CAST(NULL AS VARCHAR) AS metric)",
                   r"studies.parquet: column 'metric' is empty on \d+ row\(s\); every study needs it; "
                   r"nothing was changed")
