"""What counts as a duplicate, and what dedupe keeps: copies of an earlier
study's trials go (their study's owner and tags move to the study that keeps
them); identical repeats within one study are repeated evaluations and stay.

Scenario data is invented (random numbers with fixed seeds, the fictional
owner "mirela", "ana" and teams "ferries"/"harbour"); the last test uses the
shipped starter history (real studies on open datasets). Real DuckDB files in
tmp_path, commands through click's CliRunner. Outside reference for "which
trials survive": pandas' ``drop_duplicates`` per study, computed beside the check.
"""

from __future__ import annotations

import json

import pandas as pd
from click.testing import CliRunner
from test_curate import SPACE, add_study, cli, make_trials

from warmstart.archive import Archive
from warmstart.cli import main


def test_repeats_within_one_study_are_a_note_not_a_problem(tmp_path):
    path = tmp_path / "a.duckdb"
    trials = make_trials(1, 6)
    with Archive(path) as archive:
        # the same config evaluated twice with the same result, inside one study
        add_study(archive, "ferry delays", 1, pd.concat([trials, trials.head(2)]))
    result = cli(path, "curate", "check")
    assert result.exit_code == 0, result.stdout
    assert "archive is sound" in result.stdout
    assert "note: 2 trial(s) repeat a config of their own study" in result.stdout
    result = cli(path, "curate", "dedupe")
    assert result.exit_code == 0 and "removed 0 duplicate trial(s)" in result.stdout
    with Archive(path, read_only=True) as archive:
        assert len(archive.trials(1)) == 8


def test_a_later_study_repeating_an_earlier_one_loses_its_copies_but_not_its_own_repeats(tmp_path):
    path = tmp_path / "a.duckdb"
    trials = make_trials(2, 5)
    own = pd.concat([trials, trials.head(1)])  # trial 6 repeats trial 1 inside the study
    with Archive(path) as archive:
        add_study(archive, "ferry delays", 1, own)
        add_study(archive, "ferry delays", 1, pd.concat([own, make_trials(3, 2)]))  # imported again + 2 new
        table = archive.con.execute("SELECT study_id, number, content_key, score FROM trials").df()
    # reference: the rows of study 2 whose (content key, score) pandas does not find in study 1
    first = table[table["study_id"] == 1][["content_key", "score"]].drop_duplicates()
    second = table[table["study_id"] == 2].merge(first, how="left", indicator=True)
    expected = sorted(second.loc[second["_merge"] == "left_only", "number"])
    result = cli(path, "curate", "dedupe")
    assert result.exit_code == 0 and "removed 6 duplicate trial(s)" in result.stdout
    with Archive(path, read_only=True) as archive:
        assert len(archive.trials(1)) == 6  # the earliest study keeps its repeated evaluation
        assert archive.trials(2)["number"].tolist() == expected == [7, 8]


def _ingest(root, *extra):
    return CliRunner().invoke(main, [
        "--archive", str(root / "a.duckdb"), "ingest", str(root / "trials.csv"), "--task", "ferry delays",
        "--data", str(root / "data.csv"), "--target", "y", "--learner", "svm", "--space", str(root / "space.json"),
        *extra])


def test_dedupe_moves_owner_and_tags_of_a_removed_study_to_the_kept_one(tmp_path, small_frame):
    SPACE.save(tmp_path / "space.json")
    small_frame.to_csv(tmp_path / "data.csv", index=False)
    make_trials(4, 6).to_csv(tmp_path / "trials.csv", index=False)
    first = _ingest(tmp_path)  # no owner, no tags
    assert first.exit_code == 0 and first.stderr == ""
    second = _ingest(tmp_path, "--owner", "mirela", "--tag", "team=ferries")
    assert second.exit_code == 0
    assert "warning: 6 of the 6 trials just ingested are identical to trials of study(ies) 1" in second.stderr
    result = cli(tmp_path / "a.duckdb", "curate", "dedupe")
    assert result.exit_code == 0 and "1 study(ies) that held only duplicates" in result.stdout
    with Archive(tmp_path / "a.duckdb", read_only=True) as archive:
        rows = archive.studies()
        assert rows["study_id"].tolist() == [1]
        assert rows.loc[0, "owner"] == "mirela" and rows.loc[0, "tags"] == {"team": "ferries"}
        assert len(archive.trials(1)) == 6
    listed = cli(tmp_path / "a.duckdb", "studies", "--owner", "mirela", "--json")
    assert [s["study_id"] for s in json.loads(listed.stdout)] == [1]


def test_the_kept_study_keeps_its_own_owner_and_tag_values(tmp_path):
    path = tmp_path / "a.duckdb"
    trials = make_trials(5, 4)
    with Archive(path) as archive:
        add_study(archive, "ferry delays", 1, trials, owner="ana", tags={"team": "harbour"})
        add_study(archive, "ferry delays", 1, trials, owner="mirela", tags={"team": "ferries", "site": "north"})
        add_study(archive, "ferry delays", 1, trials, tags={"batch": "7"})
    result = cli(path, "curate", "check", "--fix")
    assert result.exit_code == 0, result.stdout
    with Archive(path, read_only=True) as archive:
        row = archive.study(1)
        assert len(archive.studies()) == 1
        assert row["owner"] == "ana" and row["tags"] == {"team": "harbour", "site": "north", "batch": "7"}


def test_fresh_starter_history_is_sound_and_dedupe_keeps_it_whole(tmp_path):
    path = tmp_path / "a.duckdb"
    assert CliRunner().invoke(main, ["--archive", str(path), "init", "--starter",
                                     "--starter-learner", "knn"]).exit_code == 0
    with Archive(path, read_only=True) as archive:
        before = archive.studies()["trial_count"].tolist()
    result = cli(path, "curate", "check")
    assert result.exit_code == 0, result.stdout
    assert "repeat a config of their own study" in result.stdout  # its designs snap to repeated integer configs
    result = cli(path, "curate", "dedupe")
    assert result.exit_code == 0 and "removed 0 duplicate trial(s)" in result.stdout
    with Archive(path, read_only=True) as archive:
        assert archive.studies()["trial_count"].tolist() == before
