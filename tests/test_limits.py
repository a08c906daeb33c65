"""Sizes no run would finish get a usage error at once, long work shows progress,
and output never creates a chain of missing folders (issue 17, point 4).

CliRunner in tmp_path; the archive and data are invented (random numbers, fixed seed).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from warmstart.archive.store import Archive
from warmstart.cli import main
from warmstart.cli.limits import MAX_PROPOSALS, MAX_QUERIES, MAX_QUERIES_PER_TASK, MAX_TRIALS, missing_folder
from warmstart.cli.progress import Progress, duration_text
from warmstart.errors import WarmstartError
from warmstart.prior import PriorError
from warmstart.space import Space

from conftest import SPACE_DICT


def run(*args, archive=None):
    prefix = ["--archive", str(archive)] if archive is not None else []
    return CliRunner().invoke(main, prefix + [str(a) for a in args])


def assert_usage_error(result, *parts):
    """Exit 2 (click's usage error), no traceback, every part named on stderr, nothing on stdout."""
    assert result.exit_code == 2, (result.stdout, result.stderr, result.exception)
    assert "Traceback" not in result.output
    assert result.stdout == ""
    for part in parts:
        assert part in result.stderr, (part, result.stderr)


@pytest.fixture
def study_archive(tmp_path):
    """An archive with one study of 8 trials (and a stand-in profile: no command here compares one)."""
    path = tmp_path / "limits.duckdb"
    space = Space.from_dict(SPACE_DICT)
    rng = np.random.default_rng(5)
    frame = pd.DataFrame({"a": rng.normal(size=30), "y": rng.integers(0, 2, 30)})
    with Archive(str(path)) as archive:
        task = archive.add_task("invented", frame, target="y", profile={"log_rows": 3.4})
        study = archive.add_study(task, learner="svm", space=space, metric="accuracy")
        configs = pd.DataFrame(space.sample(8, np.random.default_rng(1)))
        archive.add_trials(study, configs.assign(score=rng.uniform(0.5, 0.9, 8)))
    return path


# -- sizes ------------------------------------------------------------------------------------
def test_tune_budget_beyond_the_limit_is_a_usage_error(tmp_path):
    result = run("tune", tmp_path / "any.csv", "--target", "y", "--learner", "svm",
                 "--budget", "99999999999999999999", archive=tmp_path / "a.duckdb")
    assert_usage_error(result, "'--budget'", "99999999999999999999", f"0<=x<={MAX_TRIALS}")
    assert not (tmp_path / "a.duckdb").exists()  # refused before anything was opened


def test_tune_workers_beyond_the_limit_is_a_usage_error(tmp_path):
    result = run("tune", tmp_path / "any.csv", "--target", "y", "--learner", "svm", "--workers", "100000",
                 archive=tmp_path / "a.duckdb")
    assert_usage_error(result, "'--workers'", "100000", "1<=x<=256")


def test_propose_k_beyond_the_limit_is_a_usage_error(study_archive):
    result = run("propose", "--study", "1", "-k", "1000000", archive=study_archive)
    assert_usage_error(result, "'-k'", "1000000", f"1<=x<={MAX_PROPOSALS}")


@pytest.mark.parametrize("args, parts", [
    (["--budget", "100000000"], ["'--budget'", "'100000000'", f"from 1 to {MAX_QUERIES:,}"]),
    (["--budget", "10,0"], ["'--budget'", "'10,0'", "from 1 to"]),
    (["--budget", "ten"], ["'--budget'", "'ten' is not a comma-separated list"]),
    (["--repeats"], ["'--repeats' requires an argument"]),
    (["--repeats", "100000"], ["'--repeats'", "100000", "2<=x<=1000"]),
    (["--budget", "500,500", "--repeats", "100"],
     ["--budget 500,500 with --repeats 100", "100,000 queries", f"at most {MAX_QUERIES_PER_TASK:,}"]),
    (["--workers", "5000"], ["'--workers'", "5000", "1<=x<=256"]),
])
def test_gain_sizes_that_cannot_finish_are_usage_errors(tmp_path, args, parts):
    # refused before the archive is read: the file does not even exist
    result = run("gain", *args, archive=tmp_path / "none.duckdb")
    assert_usage_error(result, *parts)


def test_gain_at_the_work_limit_is_accepted_up_to_the_archive(tmp_path):
    # budgets x repeats exactly at the limit passes the size checks (and then needs an archive)
    repeats = MAX_QUERIES_PER_TASK // 1000
    result = run("gain", "--budget", "1000", "--repeats", str(repeats), archive=tmp_path / "none.duckdb")
    assert result.exit_code == 1 and "no archive here" in result.stderr, result.output


# -- progress ---------------------------------------------------------------------------------
def test_a_big_propose_batch_shows_progress_and_proposes_what_one_call_would(study_archive, monkeypatch):
    import warmstart.cli.tune_cmds as tune_cmds
    from warmstart.study import resume_study

    monkeypatch.setattr(tune_cmds, "PROGRESS_PROPOSALS", 4)  # the bar from 4 configs on, to keep the test fast
    result = run("propose", "--study", "1", "-k", "5", archive=study_archive)
    assert result.exit_code == 0, result.output
    assert "proposing 5 configs [" in result.stderr and "5/5" in result.stderr
    shown = [json.loads(line) for line in result.stdout.splitlines()]
    with Archive(str(study_archive), read_only=True) as archive:
        expected = resume_study(archive, 1, 0).search.propose(5)  # the batch as the search gives it
    assert shown == [json.loads(json.dumps(c, sort_keys=True)) for c in expected]
    small = run("propose", "--study", "1", "-k", "3", archive=study_archive)
    assert "proposing" not in small.stderr  # a small batch draws no bar


def test_a_big_ingest_and_an_export_show_progress_and_json_stays_clean(tmp_path, monkeypatch):
    import warmstart.cli.archive_cmds as archive_cmds

    monkeypatch.setattr(archive_cmds, "PROGRESS_TRIALS", 20)  # the bar from 20 trials on, to keep the test fast
    space = Space.from_dict(SPACE_DICT)
    rng = np.random.default_rng(3)
    data, trials, space_file = tmp_path / "d.csv", tmp_path / "t.csv", tmp_path / "s.json"
    pd.DataFrame({"a": rng.normal(size=40), "y": rng.integers(0, 2, 40)}).to_csv(data, index=False)
    space_file.write_text(json.dumps(SPACE_DICT))
    pd.DataFrame(space.sample(25, rng)).assign(score=rng.uniform(0.5, 0.9, 25)).to_csv(trials, index=False)
    common = ["--task", "invented", "--data", data, "--target", "y", "--learner", "mine", "--space", space_file]
    result = run("ingest", trials, *common, archive=tmp_path / "a.duckdb")
    assert result.exit_code == 0, result.output
    assert "ingesting 25 trials [" in result.stderr and "2/2" in result.stderr
    quiet = run("ingest", trials, *common, "--json", archive=tmp_path / "b.duckdb")
    assert quiet.exit_code == 0 and "ingesting" not in quiet.stderr
    json.loads(quiet.stdout)  # the JSON is whole
    out = tmp_path / "store"
    exported = run("curate", "export", out, archive=tmp_path / "a.duckdb")
    assert exported.exit_code == 0, exported.output
    assert f"exporting to {out} [" in exported.stderr and "5/5" in exported.stderr  # five tables, trials last
    assert "25 trials" in exported.stdout


def test_progress_line_counts_and_time_left(capsys, monkeypatch):
    clock = iter([100.0, 100.0, 110.0, 130.0])  # construction, then one reading per call
    monkeypatch.setattr("warmstart.cli.progress.time.monotonic", lambda: next(clock))
    bar = Progress("replaying")
    bar(0, 4)  # at the start: the bar shows before the first task ends
    bar(1, 4)  # 10 s for one of four: 30 s left
    bar(4, 4)
    lines = capsys.readouterr().err.splitlines()
    assert lines[0].startswith("replaying [......") and "0/4" in lines[0] and "? left" in lines[0]
    assert "1/4  10s elapsed, 30s left" in lines[1]
    assert "4/4  30s elapsed, 0s left" in lines[2]


@pytest.mark.parametrize("seconds, text", [(0, "0s"), (59.4, "59s"), (61, "1m01s"), (3599, "59m59s"),
                                           (3600 * 3 + 12 * 60 + 5, "3h12m")])
def test_duration_text(seconds, text):
    assert duration_text(seconds) == text


# -- output paths -----------------------------------------------------------------------------
def test_missing_folder_is_the_outermost_missing_one(tmp_path):
    assert missing_folder(tmp_path / "a" / "b" / "c.json") == tmp_path / "a"
    assert missing_folder(tmp_path / "c.json") is None


def test_prior_output_in_a_missing_directory_names_it_and_creates_nothing(tmp_path):
    out = tmp_path / "missing" / "dir" / "p.json"
    result = run("prior", tmp_path / "data.csv", "--target", "y", "--learner", "svm", "-o", out,
                 archive=tmp_path / "a.duckdb")
    assert_usage_error(result, "'-o' / '--output'", f"the directory {tmp_path / 'missing'} does not exist")
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_gain_report_in_a_missing_directory_fails_before_any_replay(tmp_path):
    result = run("gain", "--report", tmp_path / "reports" / "r.html", archive=tmp_path / "a.duckdb")
    assert_usage_error(result, "'--report'", f"the directory {tmp_path / 'reports'} does not exist")
    assert list(tmp_path.iterdir()) == []


def test_export_into_a_missing_directory_names_it(study_archive, tmp_path):
    result = run("curate", "export", tmp_path / "shared" / "team" / "store", archive=study_archive)
    assert_usage_error(result, "'DIR'", f"the directory {tmp_path / 'shared'} does not exist")
    assert not (tmp_path / "shared").exists()
    done = run("curate", "export", tmp_path / "store", archive=study_archive)  # one new folder is fine
    assert done.exit_code == 0 and (tmp_path / "store" / "manifest.json").exists(), done.output


def test_demo_output_in_a_missing_directory_names_it(tmp_path):
    result = run("demo", "--out", tmp_path / "nowhere" / "demo-out")
    assert_usage_error(result, "'--out'", f"the directory {tmp_path / 'nowhere'} does not exist")
    assert list(tmp_path.iterdir()) == []
    (tmp_path / "notes.txt").write_text("mine")
    result = run("demo", "--out", tmp_path / "notes.txt")
    assert result.exit_code == 1 and "notes.txt: is a file; give a folder" in result.stderr, result.output
    assert "Traceback" not in result.output and (tmp_path / "notes.txt").read_text() == "mine"


def test_a_new_archive_may_create_its_own_folder_but_no_more(tmp_path):
    deep = tmp_path / "missing" / "dir" / "a.duckdb"
    result = run("init", archive=deep)
    assert_usage_error(result, "'--archive'", f"the directory {tmp_path / 'missing'} does not exist")
    assert list(tmp_path.iterdir()) == []
    made = run("init", archive=tmp_path / "archive" / "warmstart.duckdb")  # like the default archive/ folder
    assert made.exit_code == 0 and (tmp_path / "archive" / "warmstart.duckdb").exists(), made.output


def test_library_writers_never_create_missing_folders(tmp_path):
    from warmstart.gain.report import write_report
    from warmstart.prior import Source, prior_from_sources, within_study_quantiles

    space = Space.from_dict({"params": {"x": {"type": "real", "low": 0.0, "high": 1.0}}})
    X = np.linspace(0.05, 0.95, 8)[:, None]
    source = Source(study_id=1, task_id=1, task="invented", X=X, quantile=within_study_quantiles(X[:, 0]),
                    numbers=np.arange(1, 9), clipped=np.zeros(8, dtype=bool))
    prior = prior_from_sources(space, [source])
    with pytest.raises(PriorError, match="the directory .*missing.* does not exist"):
        prior.save(str(tmp_path / "missing" / "p.json"))
    with pytest.raises(WarmstartError, match="the directory .*missing.* does not exist"):
        write_report([], tmp_path / "missing" / "r.html")
    assert list(tmp_path.iterdir()) == []
