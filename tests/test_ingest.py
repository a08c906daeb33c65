"""Ingest of past trials from CSV, Parquet and JSON lines; every bad input gets
an error naming the file, row, column and value, and the archive keeps exactly
what it held before."""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest

from warmstart.archive import Archive
from warmstart.archive.ingest import prepare_trials
from warmstart.errors import IngestError, WarmstartError
from warmstart.space import Space
from warmstart.data.read import read_table

HEADER = "C,tol,n_trees,depth,kernel,degree,score"
GOOD = ["1.0,0.1,100,3,rbf,,0.8", "0.5,0.2,50,2,poly,3,0.7", "20,0.3,10,8,linear,,0.6"]


def csv(*rows: str, header: str = HEADER) -> str:
    return "\n".join([header, *rows]) + "\n"


@pytest.fixture
def archive(archive_path, space, small_frame):
    """An archive file that already holds one ingested study."""
    with Archive(archive_path) as archive:
        archive.ingest(pd.read_csv(pd.io.common.StringIO(csv(*GOOD))), task="earlier", data=small_frame,
                       target="y", learner="svm", space=space)
        yield archive


def ingest_file(archive, path, space, small_frame, task="new-task"):
    """What `warmstart ingest` does: read the file, then one transactional ingest."""
    return archive.ingest(read_table(path), task=task, data=small_frame, target="y", learner="svm",
                          space=space, metric="auc", where=str(path), source="data.csv")


# -- good files in every format ------------------------------------------------------

ROWS = pd.DataFrame({
    "C": [1.0, 0.5, 20.0, 3.0],
    "tol": [0.1, 0.2, 0.3, 0.0],
    "n_trees": [100, 50, 10, 1000],
    "depth": [3, 2, 8, 1],
    "kernel": ["rbf", "poly", "linear", "poly"],
    "degree": [np.nan, 3, 4, 5],  # 4 is given for an inactive parameter: ignored
    "score": [0.8, 0.7, np.nan, 0.9],
    "status": ["ok", "ok", "ok", "failed"],
    "cost_s": [1.5, 2.0, np.nan, 0.0],
    "started_at": ["2026-03-01T12:00:00", "2026-03-01T12:00:00+02:00", None, "2026-03-02"],
    "error": [None, None, None, "out of memory"],
})
EXPECTED_CONFIGS = [
    {"C": 1.0, "tol": 0.1, "n_trees": 100, "depth": 3, "kernel": "rbf"},
    {"C": 0.5, "tol": 0.2, "n_trees": 50, "depth": 2, "kernel": "poly", "degree": 3},
    {"C": 20.0, "tol": 0.3, "n_trees": 10, "depth": 8, "kernel": "linear"},
    {"C": 3.0, "tol": 0.0, "n_trees": 1000, "depth": 1, "kernel": "poly", "degree": 5},
]


def write(frame: pd.DataFrame, path):
    if path.suffix == ".parquet":
        frame.to_parquet(path, index=False)
    elif path.suffix == ".jsonl":
        frame.to_json(path, orient="records", lines=True)
    else:
        frame.to_csv(path, index=False)
    return path


@pytest.mark.parametrize("name", ["trials.csv", "trials.parquet", "trials.jsonl"])
def test_ingest_every_format(archive, tmp_path, space, small_frame, name):
    frame = ROWS.copy()
    if name.endswith(".parquet"):
        frame["degree"] = frame["degree"].astype("Int64")
    task_id, study, n = ingest_file(archive, write(frame, tmp_path / name), space, small_frame)
    assert n == 4
    trials = archive.trials(study)
    assert trials["config"].tolist() == EXPECTED_CONFIGS
    assert trials["status"].tolist() == ["ok", "ok", "failed", "failed"]
    assert trials["score"].iloc[:2].tolist() == [0.8, 0.7] and trials["score"].iloc[2:].isna().all()
    assert trials["error"].tolist()[2:] == ["score is missing or not finite", "out of memory"]
    assert trials["cost_s"].iloc[[0, 1, 3]].tolist() == [1.5, 2.0, 0.0]
    # times are stored in UTC: 12:00 at +02:00 is 10:00 UTC
    assert trials["started_at"].tolist()[:2] == [pd.Timestamp("2026-03-01 12:00"), pd.Timestamp("2026-03-01 10:00")]
    row = archive.study(study)
    assert (row["origin"], row["metric"], row["trial_count"], row["best_score"]) == ("imported", "auc", 4, 0.8)
    assert row["finished_at"] is not None
    assert archive.tasks()["source"].tolist()[-1] == "data.csv"


def test_same_trials_from_every_format_have_the_same_keys(archive, tmp_path, space, small_frame):
    keys = []
    for name in ("t.csv", "t.parquet", "t.jsonl"):
        frame = ROWS.drop(columns=["started_at"]).copy()
        _, study, _ = ingest_file(archive, write(frame, tmp_path / name), space, small_frame)
        keys.append(archive.trials(study)["content_key"].tolist())
    assert keys[0] == keys[1] == keys[2]
    assert len(archive.tasks()) == 2  # the task was reused: same name, same data


def test_levels_are_read_by_meaning(archive, tmp_path, small_frame):
    space = Space.from_dict({"params": {
        "bins": {"type": "choice", "choices": ["10", "20", "auto"]},  # text levels that look like numbers
        "scale": {"type": "choice", "choices": [1, 2.5, True]},
        "C": {"type": "real", "low": 0.0, "high": 1.0},
    }})
    path = tmp_path / "levels.csv"
    path.write_text("bins,scale,C,score\n10,1,0.5,0.1\n20,2.5,0.25,0.2\nauto,true,1,0.3\n10,1.0,0,0.4\n")
    _, study, _ = ingest_file(archive, path, space, small_frame, task="levels")
    configs = archive.trials(study)["config"].tolist()
    assert configs == [
        {"C": 0.5, "bins": "10", "scale": 1}, {"C": 0.25, "bins": "20", "scale": 2.5},
        {"C": 1.0, "bins": "auto", "scale": True}, {"C": 0.0, "bins": "10", "scale": 1},
    ]
    assert [type(c["scale"]) for c in configs] == [int, float, bool, int]
    only_numbers = tmp_path / "numbers.csv"
    only_numbers.write_text("bins,scale,C,score\n10,2.5,0.5,0.1\n20,1,0.5,0.2\n")  # a column of numbers only
    _, study, _ = ingest_file(archive, only_numbers, space, small_frame, task="numbers")
    assert [c["bins"] for c in archive.trials(study)["config"]] == ["10", "20"]


def test_large_table_is_validated_row_by_row_meaning(space):
    # vectorised checks find the first bad row of a large table, not just "some row"
    frame = pd.DataFrame(space.sample(5000, rng=2), columns=space.names).assign(score=0.5)
    frame.loc[4321, "kernel"] = "sigmoid"
    with pytest.raises(IngestError, match=r"big\.parquet: row 4322, column 'kernel': value 'sigmoid' is not allowed"):
        prepare_trials(space, frame, where="big.parquet")


# -- bad input: a clear error, nothing written ---------------------------------------

BAD_CSV = [
    ("unknown column", csv("1.0,0.1,100,3,rbf,,0.8,5", header=HEADER + ",gamma"),
     r"unknown column\(s\) \['gamma'\]; expected the space's parameters \['C', 'tol', 'n_trees', 'depth', 'kernel', 'degree'\]"),
    ("missing parameter column", csv("1.0,0.1,100,rbf,,0.8", header="C,tol,n_trees,kernel,degree,score"),
     r"missing column\(s\) for parameter\(s\) \['depth'\]"),
    ("missing score column", csv("1.0,0.1,100,3,rbf,", header="C,tol,n_trees,depth,kernel,degree"),
     r"no 'score' column; columns are \['C', 'tol', 'n_trees', 'depth', 'kernel', 'degree'\]"),
    ("value above the range", csv(GOOD[0], "1.0,0.1,100,9,rbf,,0.8"),
     r"row 2, column 'depth': value 9 is out of range; integer in \[1, 8\]"),
    ("log value below the range", csv(GOOD[0], GOOD[1], "0.0,0.1,100,3,rbf,,0.8"),
     r"row 3, column 'C': value 0\.0 is out of range; real in \[0\.001, 1000\.0\], log scale"),
    ("text in a numeric column", csv(GOOD[0], "1.0,high,100,3,rbf,,0.8"),
     r"row 2, column 'tol': value 'high' is not a number; real in \[0\.0, 0\.5\]"),
    ("boolean in a numeric column", csv("1.0,True,100,3,rbf,,0.8", "1.0,False,100,3,rbf,,0.8"),
     r"row 1, column 'tol': value True is a boolean; real in \[0\.0, 0\.5\]"),
    ("non-integer for an integer", csv(GOOD[0], "1.0,0.1,100,2.5,rbf,,0.8"),
     r"row 2, column 'depth': value 2\.5 is not a whole number; integer in \[1, 8\]"),
    ("unknown choice level", csv(GOOD[0], GOOD[1], "1.0,0.1,100,3,sigmoid,,0.8"),
     r"row 3, column 'kernel': value 'sigmoid' is not allowed; one of \"rbf\", \"poly\", \"linear\""),
    ("active parameter left empty", csv(GOOD[0], "1.0,0.1,100,3,poly,,0.8"),
     r"row 2, column 'degree': value nan is missing or not finite, but parameter 'degree' is active here; integer in \[2, 5\]"),
    ("infinite parameter value", csv(GOOD[0], "inf,0.1,100,3,rbf,,0.8"),
     r"row 2, column 'C': value inf is not finite"),
    ("text score", csv(GOOD[0], "1.0,0.1,100,3,rbf,,good"),
     r"row 2, column 'score': value 'good' is not a number"),
    ("bad status", csv("1.0,0.1,100,3,rbf,,0.8,ok", "1.0,0.1,100,3,rbf,,0.8,done", header=HEADER + ",status"),
     r"row 2, column 'status': value 'done' is not a status; use one of \['ok', 'failed'\]"),
    ("bad date", csv("1.0,0.1,100,3,rbf,,0.8,2026-03-01", "1.0,0.1,100,3,rbf,,0.8,yesterday", header=HEADER + ",started_at"),
     r"row 2, column 'started_at': value 'yesterday' is not a date-time \(use ISO 8601"),
    ("impossible date", csv("1.0,0.1,100,3,rbf,,0.8,2026-13-45", header=HEADER + ",finished_at"),
     r"row 1, column 'finished_at': value '2026-13-45' is not a date-time"),
    ("negative cost", csv("1.0,0.1,100,3,rbf,,0.8,2", "1.0,0.1,100,3,rbf,,0.8,-1", header=HEADER + ",cost_s"),
     r"row 2, column 'cost_s': value -1 is not a cost in seconds \(a finite number >= 0\)"),
    ("text cost", csv("1.0,0.1,100,3,rbf,,0.8,slow", header=HEADER + ",cost_s"),
     r"row 1, column 'cost_s': value 'slow' is not a number"),
    ("empty file", "", r"the file is empty"),
    ("header-only file", HEADER + "\n", r"the table has a header but no rows"),
    ("malformed file", csv(GOOD[0], '1.0,0.1,"100,3,rbf,,0.8'), r"not a valid CSV file"),
    ("row longer than the header", csv("1.0,0.1,100,3,rbf,,0.8,7"), r"not a valid CSV file \(a row has more fields"),
]


@pytest.mark.parametrize("case, text, match", BAD_CSV, ids=[c[0] for c in BAD_CSV])
def test_bad_csv_is_refused_and_nothing_changes(archive, tmp_path, space, small_frame, table_dump, case, text, match):
    path = tmp_path / "bad trials.csv"
    path.write_text(text)
    before = table_dump(archive.con)
    with pytest.raises(WarmstartError, match=re.escape(str(path)) + ": " + match):
        ingest_file(archive, path, space, small_frame)
    assert table_dump(archive.con) == before


def frame_of(**changes) -> pd.DataFrame:
    frame = pd.DataFrame([EXPECTED_CONFIGS[0], EXPECTED_CONFIGS[1]], columns=list(EXPECTED_CONFIGS[1]))
    frame["score"] = [0.5, 0.6]
    for name, values in changes.items():
        frame[name] = values
    return frame


BAD_TYPED = [
    ("boolean column", "trials.parquet", frame_of(tol=[True, False]), r"row 1, column 'tol': value True is a boolean"),
    ("text column", "trials.parquet", frame_of(depth=["3", "three"]), r"row 2, column 'depth': value 'three' is not a number"),
    ("float for an integer", "trials.parquet", frame_of(n_trees=[100.0, 50.5]), r"row 2, column 'n_trees': value 50\.5 is not a whole number"),
    ("boolean among numbers", "trials.jsonl", frame_of(depth=pd.Series([3, True], dtype=object)), r"row 2, column 'depth': value True is a boolean"),
    ("number for a text level", "trials.jsonl", frame_of(kernel=pd.Series(["rbf", 7], dtype=object)), r"row 2, column 'kernel': value 7 is not allowed"),
    ("boolean score", "trials.parquet", frame_of(score=[True, False]), r"row 1, column 'score': value True is a boolean"),
    ("integer status", "trials.parquet", frame_of(status=[1, 0]), r"row 1, column 'status': value 1 is not a status"),
    ("unknown column", "trials.jsonl", frame_of(gamma=[1, 2]), r"unknown column\(s\) \['gamma'\]"),
]


@pytest.mark.parametrize("case, name, frame, match", BAD_TYPED, ids=[c[0] for c in BAD_TYPED])
def test_wrong_types_in_typed_files(archive, tmp_path, space, small_frame, table_dump, case, name, frame, match):
    path = write(frame, tmp_path / name)
    before = table_dump(archive.con)
    with pytest.raises(IngestError, match=re.escape(str(path)) + ": " + match):
        ingest_file(archive, path, space, small_frame)
    assert table_dump(archive.con) == before


@pytest.mark.parametrize(
    "name, content, match",
    [
        ("trials.xlsx", "C,score\n1,2\n", r"cannot tell the format from the extension '\.xlsx'"),
        ("trials.parquet", "not parquet at all", r"not a valid Parquet file"),
        ("trials.jsonl", '{"C": 1.0, "score": 0.5}\n{"C": \n', r"not a valid JSON lines file"),
        ("trials.jsonl", "", r"the file is empty"),
    ],
)
def test_unreadable_files(archive, tmp_path, space, small_frame, table_dump, name, content, match):
    path = tmp_path / name
    path.write_text(content)
    before = table_dump(archive.con)
    with pytest.raises(WarmstartError, match=re.escape(str(path)) + ": " + match):
        ingest_file(archive, path, space, small_frame)
    assert table_dump(archive.con) == before


def test_bad_dataset_target_changes_nothing(archive, tmp_path, space, small_frame, table_dump):
    path = write(ROWS, tmp_path / "t.csv")
    before = table_dump(archive.con)
    with pytest.raises(WarmstartError, match=r"data\.csv: target column 'label' not found"):
        archive.ingest(read_table(path), task="x", data=small_frame, target="label", learner="svm", space=space,
                       source="data.csv")
    assert table_dump(archive.con) == before


def test_duplicate_columns(space):
    frame = pd.DataFrame([[1.0, 0.1, 100, 3, "rbf", 0.5, 0.7]], columns=["C", "tol", "n_trees", "depth", "kernel", "score", "score"])
    with pytest.raises(IngestError, match=r"t\.jsonl: column\(s\) \['score'\] appear more than once"):
        prepare_trials(space, frame, where="t.jsonl")


def test_conditional_column_may_be_absent_when_never_active(space):
    frame = pd.DataFrame([EXPECTED_CONFIGS[0]]).assign(score=0.5)  # no 'degree' column, kernel rbf
    prepared = prepare_trials(space, frame)
    assert len(prepared) == 1
    frame = pd.DataFrame([EXPECTED_CONFIGS[1]]).drop(columns="degree").assign(score=0.5)
    with pytest.raises(IngestError, match=r"row 1: parameter 'degree' is active but there is no column for it"):
        prepare_trials(space, frame)


def test_messages_show_plain_values(space):
    frame = frame_of(depth=np.array([3, 30], dtype=np.int64))
    with pytest.raises(IngestError) as info:
        prepare_trials(space, frame, where="t.parquet")
    assert "value 30 is out of range" in str(info.value) and "np." not in str(info.value)
    assert json.dumps(str(info.value))  # a plain message
