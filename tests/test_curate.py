"""`curate check [--fix]`, `curate dedupe`, `curate prune`, `tag` and the
`studies` filters, on real DuckDB files in tmp_path.

Outside references: pandas' ``groupby(...).transform("first")`` for which
duplicate survives; Python's ``hashlib.sha256`` for recomputed content keys;
an independent canonical dump of every table made with DuckDB itself
(``dump_tables`` in conftest) to prove that declined or failed commands change
nothing. The data is invented (random numbers, fixed seeds).

The helpers at the top are shared with the other curation test files.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from conftest import SPACE_DICT, dump_tables
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from warmstart.archive import Archive
from warmstart.archive.curate import (
    DEDUPE_STEPS,
    PRUNE_STEPS,
    apply_prune,
    archive_digest,
    check_archive,
    count_duplicates,
    dedupe_trials,
    fix_archive,
    label_study,
    plan_prune,
)
from warmstart.cli import main
from warmstart.errors import ArchiveError
from warmstart.space import Space

SPACE = Space.from_dict(SPACE_DICT)
# Names holding quotes, semicolons, SQL and shell metacharacters (stored and shown verbatim).
NASTY_TASK = "Robert'); DROP TABLE tasks;--"
NASTY_LEARNER = 'svm"; rm -rf / $(whoami) `id` | & > x'
NASTY_OWNER = "O'Brien; DELETE FROM studies; --"
NASTY_TAG = ("k'ey;", "v\"al $(ls) `x` ; DROP TABLE trials")


# -- shared helpers (imported by test_merge, test_reliability, test_bad_inputs) -----
def make_data(seed: int, n: int = 40) -> pd.DataFrame:
    """An invented dataset: two numeric features and a two-class target y."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"f1": rng.normal(size=n), "f2": rng.normal(size=n), "y": rng.integers(0, 2, n)})


def make_trials(seed: int, n: int, space: Space = SPACE) -> pd.DataFrame:
    """n uniform configs of ``space`` with invented scores."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(space.sample(n, rng=rng))
    frame["score"] = rng.random(n).round(6)
    return frame


def add_study(archive: Archive, task: str, data_seed: int, trials: pd.DataFrame, learner: str = "svm",
              space: Space = SPACE, **options) -> int:
    """Task (profile given, so nothing is computed) + study + trials; returns the study id."""
    task_id = archive.add_task(task, make_data(data_seed), "y", profile={"log_rows": float(data_seed)})
    study = archive.add_study(task_id, learner, space, **options)
    archive.add_trials(study, trials)
    return study


def cli(archive_path, *args, input=None):
    """Run the CLI on ``archive_path`` in-process (click's CliRunner)."""
    return CliRunner().invoke(main, ["--archive", str(archive_path), *map(str, args)], input=input)


def digest(path) -> dict:
    """archive_digest of a file, opened read-only and closed."""
    with Archive(path, read_only=True) as archive:
        return archive_digest(archive)


@pytest.fixture
def two_studies(tmp_path) -> Path:
    """An archive file with two studies of one task, the second repeating 5 trials of the first."""
    path = tmp_path / "a.duckdb"
    with Archive(path) as archive:
        first = make_trials(1, 12)
        add_study(archive, "churn", 1, first, owner="ana", tags={"team": "retail"})
        add_study(archive, "churn", 1, pd.concat([first.head(5), make_trials(2, 3)]), learner="svm", owner="ben")
    return path


# -- check -----------------------------------------------------------------------------
def test_check_passes_a_sound_archive(tmp_path):
    path = tmp_path / "a.duckdb"
    with Archive(path) as archive:
        add_study(archive, "churn", 1, make_trials(1, 10))
        assert check_archive(archive).ok
    result = cli(path, "curate", "check")
    assert result.exit_code == 0, result.output
    assert "archive is sound" in result.stdout
    report = json.loads(cli(path, "curate", "check", "--json").stdout)
    assert report["ok"] and report["notes"]["trials"] == 10 and len(report["findings"]) == 16


def _inject_every_problem(path: Path) -> dict:
    """Break an archive in every way check looks for; return what was done."""
    with Archive(path) as archive:
        a = add_study(archive, "churn", 1, make_trials(1, 10))
        add_study(archive, "churn", 1, make_trials(1, 10))  # 10 exact duplicates of study a
        b = add_study(archive, "stores", 2, make_trials(3, 6))
        scored = add_study(archive, "stores", 2, make_trials(7, 3), metric="accuracy")
        empty_task = archive.add_task("returns", make_data(3), "y", profile={"log_rows": 1.0})
        archive.add_study(empty_task, "svm", SPACE)  # a study with no trials
        no_profile = archive.add_task("footfall", make_data(4), "y", profile={"log_rows": 1.0})
        old_profile = archive.add_task("basket", make_data(5), "y", profile={"log_rows": 1.0})
        con = archive.con
        con.execute("DELETE FROM profiles WHERE task_id = ?", [no_profile])
        con.execute("UPDATE profiles SET version = '0' WHERE task_id = ?", [old_profile])
        con.execute("INSERT INTO profiles VALUES (999, 'log_rows', 1.0, '1')")  # orphan profile
        con.execute("INSERT INTO trials SELECT 777, number, config, score, status, cost_s, started_at, finished_at, "
                    "error, content_key, fold_scores FROM trials WHERE study_id = ? AND number <= 2", [b])  # 2 orphan trials
        con.execute("INSERT INTO studies (study_id, task_id, learner, space_id, metric, direction, origin, created_at) "
                    "SELECT 500, 4242, 'svm', space_id, 'score', 'maximize', 'cold', now() FROM spaces LIMIT 1")
        con.execute("INSERT INTO trials SELECT 500, number, config, score + 1, status, cost_s, started_at, "
                    "finished_at, error, content_key, fold_scores FROM trials WHERE study_id = ? AND number <= 2", [b])
        con.execute("UPDATE trials SET score = 'inf'::DOUBLE WHERE study_id = ? AND number = 1", [b])
        con.execute("UPDATE trials SET status = 'failed' WHERE study_id = ? AND number = 2", [b])
        con.execute("UPDATE trials SET content_key = 'stale' WHERE study_id = ? AND number = 3", [b])
        con.execute("UPDATE trials SET score = 1.5 WHERE study_id = ? AND number = 1", [scored])  # accuracy > 1
        con.execute("UPDATE trials SET number = 4 WHERE study_id = ? AND number = 5", [b])
        bad_config = json.dumps({"C": 5000.0, "depth": 3, "kernel": "rbf", "n_trees": 10, "tol": 0.1})
        con.execute("UPDATE trials SET config = ? WHERE study_id = ? AND number = 6", [bad_config, b])
        con.execute("INSERT INTO spaces VALUES (90, 'svm', '{\"params\": {\"x\": {\"type\": \"real\", \"low\": 2, "
                    "\"high\": 1}}}', 'h')")
        con.execute("UPDATE spaces SET content_hash = 'stale' WHERE space_id = (SELECT min(space_id) FROM spaces)")
    return {"a": a, "b": b}


EXPECTED = {  # check -> (count, fixable)
    "orphan_profiles": (1, True), "orphan_trials": (2, True), "studies_without_task": (1, False),
    "studies_without_space": (0, False), "unreadable_spaces": (1, False), "stale_space_hashes": (1, True),
    "trials_outside_space": (1, False), "nonfinite_scores_ok": (1, True), "scores_out_of_range": (1, False), "failed_with_score": (1, True),
    "stale_content_keys": (2, True),  # the one set to 'stale' and the one whose config was edited
    "repeated_trial_numbers": (1, True), "duplicate_trials": (10, True),
    "profile_version_mismatch": (1, False), "studies_without_trials": (1, True), "tasks_without_profiles": (1, False),
}


def test_check_finds_every_kind_of_problem_and_fix_repairs_the_safe_ones(tmp_path):
    path = tmp_path / "a.duckdb"
    ids = _inject_every_problem(path)
    with Archive(path, read_only=True) as archive:
        report = check_archive(archive)
    found = {f.check: (f.count, f.fixable) for f in report.findings}
    assert found == EXPECTED
    examples = {f.check: f.examples for f in report.findings}
    assert any("5000" in e and "'C'" in e for e in examples["trials_outside_space"])
    assert examples["tasks_without_profiles"] == ("task 'footfall'",)

    before = dump_tables(path)
    result = cli(path, "curate", "check")
    assert result.exit_code == 1
    assert "duplicate_trials" in result.stdout and "task 'footfall'" in result.stdout
    assert dump_tables(path) == before  # check alone changes nothing

    result = cli(path, "curate", "check", "--fix")
    assert result.exit_code == 1  # unfixable problems remain, and say so
    assert "fixed: deleted trials repeating an earlier study's (kept the earliest study's copies): 10" in result.stdout
    assert "fixed: deleted orphan trials (their study does not exist): 2" in result.stdout
    with Archive(path, read_only=True) as archive:
        after = {f.check: f.count for f in check_archive(archive).findings}
        for check, (count, fixable) in EXPECTED.items():
            assert after[check] == (0 if fixable else count), check
        b = archive.trials(ids["b"]).set_index("number")
        # reference: hashlib.sha256 over "fingerprint|learner|config", the documented content key
        fp = archive.con.execute("SELECT fingerprint FROM tasks WHERE name = 'stores'").fetchall()[0][0]
        raw = archive.con.execute("SELECT config FROM trials WHERE study_id = ? AND number = 3", [ids["b"]]).fetchall()
        assert b.loc[3, "content_key"] == hashlib.sha256(f"{fp}|svm|{raw[0][0]}".encode()).hexdigest()
        assert b.loc[1, "status"] == "failed" and np.isnan(b.loc[1, "score"])
        assert "removed: a failed trial has no score" in b.loc[2, "error"] and np.isnan(b.loc[2, "score"])
        assert sorted(b.index) == [1, 2, 3, 4, 6, 7]  # the repeated 4 renumbered after the last (6)
        assert len(archive.trials(ids["a"])) == 10  # the earliest copy kept


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(
        st.tuples(st.integers(0, 2), st.integers(0, 4), st.sampled_from([0.25, 0.5, float("nan")])),
        min_size=1, max_size=25,
    ),
    st.sampled_from([("score", "score", "score"), ("score", "loss", "score")]),
)
def test_dedupe_keeps_what_a_pandas_groupby_keeps(rows, metrics):
    """Random trials over a pool of 5 configs and 3 scores, spread over 3 studies."""
    pool = SPACE.sample(5, rng=0)
    with Archive(":memory:") as archive:
        task = archive.add_task("t", make_data(0), "y", profile={"log_rows": 1.0})
        studies = [archive.add_study(task, "svm", SPACE, metric=m) for m in metrics]
        for s, study in enumerate(studies):
            mine = [(pool[c], score) for k, c, score in rows if k == s]
            if mine:
                archive.add_trials(study, pd.DataFrame([{**c, "score": v} for c, v in mine]))
        table = archive.con.execute(
            "SELECT t.study_id, t.number, t.content_key, s.metric, s.direction, t.status, t.score, s.created_at "
            "FROM trials t JOIN studies s USING (study_id)").df()
        # reference: pandas' groupby(...).transform("first") names the earliest study of each group of
        # identical trials in the documented order; that study keeps all its copies, later studies' copies go
        ordered = table.sort_values(["created_at", "study_id", "number"])
        keeper = ordered.groupby(["content_key", "metric", "direction", "status", "score"], dropna=False,
                                 sort=False)["study_id"].transform("first")
        expected = ordered[ordered["study_id"] == keeper]
        assert count_duplicates(archive) == len(table) - len(expected)
        removed, _ = dedupe_trials(archive)
        assert removed == len(table) - len(expected)
        kept = archive.con.execute("SELECT study_id, number FROM trials ORDER BY ALL").fetchall()
        assert kept == sorted(zip(expected["study_id"], expected["number"]))
        assert dedupe_trials(archive) == (0, 0)  # idempotent


def test_dedupe_command_counts_then_removes(two_studies):
    before = dump_tables(two_studies)
    result = cli(two_studies, "curate", "dedupe", "--dry-run")
    assert result.exit_code == 0 and "would remove 5 duplicate trial(s)" in result.stdout
    assert dump_tables(two_studies) == before
    result = cli(two_studies, "curate", "dedupe", "--json")
    assert json.loads(result.stdout) == {"dry_run": False, "trials_removed": 5, "studies_removed": 0}
    with Archive(two_studies, read_only=True) as archive:
        assert list(archive.studies()["trial_count"]) == [12, 3]
        assert archive.trials(2)["number"].tolist() == [6, 7, 8]


def test_dedupe_removes_a_study_that_only_repeats_another(tmp_path):
    path = tmp_path / "a.duckdb"
    with Archive(path) as archive:
        add_study(archive, "churn", 1, make_trials(1, 8))
        add_study(archive, "churn", 1, make_trials(1, 8))  # the same file ingested twice
    result = cli(path, "curate", "dedupe")
    assert "removed 8 duplicate trial(s)" in result.stdout and "1 study(ies) that held only duplicates" in result.stdout
    with Archive(path, read_only=True) as archive:
        assert archive.studies()["study_id"].tolist() == [1]


def test_dedupe_and_prune_report_their_steps_in_order_and_json_stays_clean(tmp_path, monkeypatch):
    """Long curation shows progress (issue 17, point 4): each step is announced once, in order,
    and the result is the same as without a progress callback."""
    path = tmp_path / "a.duckdb"
    with Archive(path) as archive:
        add_study(archive, "churn", 1, make_trials(1, 8))
        add_study(archive, "churn", 1, make_trials(1, 8))
        add_study(archive, "fraud", 2, make_trials(2, 6))
        seen: list[str] = []
        assert dedupe_trials(archive, progress=seen.append) == (8, 1)
        assert seen == list(DEDUPE_STEPS)
        seen.clear()
        plan = plan_prune(archive, learner="svm")
        assert apply_prune(archive, plan, progress=seen.append) == (14, 2)
        assert seen == list(PRUNE_STEPS)
    with Archive(tmp_path / "c.duckdb") as archive:
        add_study(archive, "churn", 1, make_trials(1, 8))
        add_study(archive, "churn", 1, make_trials(1, 8))
    small = cli(tmp_path / "c.duckdb", "curate", "dedupe", "--dry-run")
    assert small.exit_code == 0 and small.stderr == ""  # a small archive draws no bar
    import warmstart.cli.curate_cmds as curate_cmds

    monkeypatch.setattr(curate_cmds, "PROGRESS_TRIALS", 10)  # the bar from 10 trials on, to keep the test fast
    result = cli(tmp_path / "c.duckdb", "curate", "dedupe")
    assert "deduplicating" in result.stderr and "removed 8 duplicate" in result.stdout
    result = cli(tmp_path / "c.duckdb", "curate", "prune", "--learner", "svm", "--yes", "--json")
    assert result.exit_code == 0 and "pruning" not in result.stderr
    assert json.loads(result.stdout)["trials_removed"] == 8


# -- prune --------------------------------------------------------------------------------
def test_prune_failed_trials_asks_and_a_no_changes_nothing(two_studies):
    with Archive(two_studies) as archive:
        archive.record_trial(1, SPACE.sample(1, rng=5)[0], float("nan"))
        archive.record_trial(2, SPACE.sample(1, rng=6)[0], None)
    before = dump_tables(two_studies)
    result = cli(two_studies, "curate", "prune", "--failed", input="n\n")
    assert result.exit_code == 1 and "would remove 2 failed trials" in result.stdout
    assert "Remove them?" in result.stderr
    assert dump_tables(two_studies) == before
    result = cli(two_studies, "curate", "prune", "--failed", input="y\n")
    assert result.exit_code == 0 and "removed 2 failed trials and 0 whole study(ies)" in result.stdout
    with Archive(two_studies, read_only=True) as archive:
        assert archive.con.execute("SELECT count(*) FROM trials WHERE status = 'failed'").fetchall() == [(0,)]
        assert archive.studies()["trial_count"].tolist() == [12, 8]


@pytest.mark.parametrize(
    ("options", "gone"),
    [
        ({"owner": "ben"}, [2]),
        ({"tags": {"team": "retail"}}, [1]),
        ({"learner": "svm", "owner": "ana"}, [1]),
        ({"learner": "gbt"}, []),
        ({"before": "2000-01-01"}, []),
        ({"before": "2999-01-01T00:00:00+02:00"}, [1, 2]),
    ],
)
def test_prune_filters_select_whole_studies(two_studies, options, gone):
    with Archive(two_studies) as archive:
        plan = plan_prune(archive, **options)
        assert plan.studies["study_id"].tolist() == gone
        trial_count = int(archive.studies().set_index("study_id").loc[gone, "trial_count"].sum())
        assert apply_prune(archive, plan) == (trial_count, len(gone))
        assert sorted(set(archive.studies()["study_id"])) == sorted({1, 2} - set(gone))
        assert archive.con.execute("SELECT count(*) FROM trials WHERE study_id IN (SELECT * FROM "
                                   "(VALUES (1), (2)) v(s) WHERE s NOT IN (SELECT study_id FROM studies))"
                                   ).fetchall() == [(0,)]


def test_prune_command_with_yes_and_without_filters(two_studies):
    result = cli(two_studies, "curate", "prune", "--yes")
    assert result.exit_code == 1 and "say what to prune" in result.stderr
    result = cli(two_studies, "curate", "prune", "--tag", "team=retail", "--yes")
    assert result.exit_code == 0, result.output
    assert "removed 12 trials and 1 whole study(ies)" in result.stdout and "churn" in result.stdout
    result = cli(two_studies, "curate", "prune", "--owner", "nobody", "--yes")
    assert "nothing matches" in result.stdout


# -- tags, owners, filters, names ---------------------------------------------------------
def test_tag_sets_and_removes_tags_and_owner(two_studies):
    result = cli(two_studies, "tag", "2", "region=north", "season=winter", "--owner", "cleo")
    assert result.exit_code == 0, result.output
    assert result.stdout.strip() == "study 2: owner cleo; tags region=north, season=winter"
    result = cli(two_studies, "tag", "2", "--remove", "season", "--json")
    assert json.loads(result.stdout) == {"study_id": 2, "owner": "cleo", "tags": {"region": "north"}}
    result = cli(two_studies, "studies", "--tag", "region=north", "--json")
    assert [row["study_id"] for row in json.loads(result.stdout)] == [2]
    result = cli(two_studies, "studies", "--owner", "ana", "--tag", "team=retail", "--json")
    assert [row["study_id"] for row in json.loads(result.stdout)] == [1]
    result = cli(two_studies, "studies", "--owner", "ana", "--tag", "team=other", "--json")
    assert json.loads(result.stdout) == []
    with Archive(two_studies) as archive:
        assert label_study(archive, 1, owner="")["owner"] is None
        with pytest.raises(ArchiveError, match="no study with id 9"):
            label_study(archive, 9, tags={"a": "b"})


def test_names_with_quotes_sql_and_shell_characters_are_kept_verbatim(tmp_path):
    path = tmp_path / "a.duckdb"
    SPACE.save(tmp_path / "space.json")
    make_data(1).to_csv(tmp_path / "data.csv", index=False)
    make_trials(1, 6).to_csv(tmp_path / "trials.csv", index=False)
    result = cli(path, "ingest", tmp_path / "trials.csv", "--task", NASTY_TASK, "--data", tmp_path / "data.csv",
                 "--target", "y", "--learner", NASTY_LEARNER, "--space", tmp_path / "space.json",
                 "--owner", NASTY_OWNER)
    assert result.exit_code == 0, result.output
    result = cli(path, "tag", "1", "=".join(NASTY_TAG))
    assert result.exit_code == 0, result.output
    result = cli(path, "studies", "--owner", NASTY_OWNER, "--tag", "=".join(NASTY_TAG), "--json")
    row = json.loads(result.stdout)[0]
    assert (row["task"], row["learner"], row["owner"], row["tags"]) == (
        NASTY_TASK, NASTY_LEARNER, NASTY_OWNER, {NASTY_TAG[0]: NASTY_TAG[1]})
    shown = cli(path, "studies").stdout
    assert NASTY_TASK in shown and NASTY_LEARNER in shown and NASTY_OWNER in shown
    with Archive(path, read_only=True) as archive:
        assert archive.tasks()["name"].tolist() == [NASTY_TASK]
        assert check_archive(archive).ok


def test_archive_digest_agrees_with_an_independent_dump(two_studies, tmp_path):
    """Same rows -> same digest; one changed value -> another digest (the dump agrees)."""
    first, dump = digest(two_studies), dump_tables(two_studies)
    copy = tmp_path / "copy.duckdb"
    copy.write_bytes(two_studies.read_bytes())
    assert digest(copy) == first and dump_tables(copy) == dump
    with Archive(copy) as archive:
        archive.con.execute("UPDATE trials SET score = score + 1e-9 WHERE study_id = 2 AND number = 1")
    assert digest(copy)["trials"] != first["trials"] and dump_tables(copy)["trials"] != dump["trials"]
    assert {k: v for k, v in digest(copy).items() if k != "trials"} == {k: v for k, v in first.items() if k != "trials"}


def test_fix_archive_on_a_sound_archive_does_nothing(two_studies):
    with Archive(two_studies) as archive:
        dedupe_trials(archive)
        before = archive_digest(archive)
        assert fix_archive(archive) == []
        assert archive_digest(archive) == before
