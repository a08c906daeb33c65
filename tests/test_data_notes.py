"""Nothing dropped, merged or converted without a word: short CSV rows, rows
without a target, labels that differ only in case or spaces, infinite values,
empty and constant columns -- each counted in a note, in the library
(``read_table``'s ``attrs["notes"]``, ``clean_table``'s notes) and on the
command line (``note:`` on stderr; ``--strict`` refuses the file instead).

Data: scikit-learn's bundled iris (Fisher 1936), breast cancer (UCI Wisconsin
diagnostic) and diabetes (Efron et al. 2004) tables, changed as each test says
(the ``yes``/``no`` labels and the extra columns are invented). References:
``pandas.read_csv`` and Python's ``csv`` module for how a file reads, a table
cleaned by hand with pandas for what profiles and objectives must equal.
"""

from __future__ import annotations

import csv
import gzip
import io

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris

from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.data.clean import clean_table
from warmstart.data import read as tables
from warmstart.data.read import TableError, read_table
from warmstart.errors import ProfileError
from warmstart.evaluate.learners import cv_objective
from warmstart.evaluate.objective import ObjectiveError
from warmstart.profile import profile

KNN = {"n_neighbors": 7, "weights": "uniform", "p": 2}


def _iris() -> pd.DataFrame:
    return load_iris(as_frame=True).frame


def _same_profile(got: dict, expected: dict) -> None:
    assert list(got) == list(expected)
    np.testing.assert_array_equal(np.array(list(got.values())), np.array(list(expected.values())))


def _short_rows_csv(path, frame: pd.DataFrame, short: dict[int, int]) -> list[int]:
    """Write ``frame`` as CSV with data row i cut to ``short[i]`` fields; the file's line numbers of the cut rows."""
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False)
    lines = buffer.getvalue().splitlines()
    for i, width in short.items():
        lines[i + 1] = ",".join(lines[i + 1].split(",")[:width])
    path.write_text("\n".join(lines) + "\n")
    return [i + 2 for i in sorted(short)]  # line 1 is the header


# -- short rows (fewer fields than the header) -----------------------------------------------
def _ferry_table(n: int = 240) -> pd.DataFrame:
    """Invented: 11 numeric readings and a yes/no target, the width of the tester's file."""
    rng = np.random.default_rng(3)
    frame = pd.DataFrame(rng.normal(size=(n, 11)).round(3), columns=[f"x{j}" for j in range(11)])
    return frame.assign(late=np.where(rng.random(n) < 0.4, "yes", "no"))


def test_short_rows_are_counted_with_their_line_numbers_and_read_as_pandas_reads_them(tmp_path):
    frame = _ferry_table()
    cut = {i: 5 for i in range(0, 240, 7)}  # 35 rows of 240 keep 5 of 12 fields
    path = tmp_path / "ferries.csv"
    lines = _short_rows_csv(path, frame, cut)
    table = read_table(path)
    # reference: pandas.read_csv reads a short row with its missing fields empty
    pd.testing.assert_frame_equal(table, pd.read_csv(path))
    assert table.iloc[list(cut), 5:].isna().all().all()
    [note] = table.attrs["notes"]
    assert note == (f"35 of 240 rows have fewer fields than the header's 12 (5 fields; lines "
                    f"{', '.join(map(str, lines[:5]))} ...): the fields they lack are read as missing")
    # the same rows then have no target: a second note, and the profile uses the other 205 rows
    cleaned = clean_table(table, "late")
    assert "35 of 240 rows (14.6 %) have no value in the target column 'late': left out" in cleaned.notes
    assert len(cleaned.frame) == 205


def test_short_rows_of_several_widths_in_a_compressed_file(tmp_path):
    frame = _iris()
    path = tmp_path / "iris.csv"
    lines = _short_rows_csv(path, frame, {0: 2, 9: 4})
    gz = tmp_path / "iris.csv.gz"
    gz.write_bytes(gzip.compress(path.read_bytes()))
    assert read_table(gz).attrs["notes"] == [
        f"2 of 150 rows have fewer fields than the header's 5 (2 to 4 fields; lines {lines[0]}, {lines[1]}): "
        "the fields they lack are read as missing"
    ]


def test_empty_fields_written_out_are_not_short_rows(tmp_path):
    # "5.1,3.5,," has every field (two of them empty); only a row that stops early is short
    path = tmp_path / "written.csv"
    path.write_text("a,b,c,d\n5.1,3.5,,\n4.9,3.0,1.4,0.2\n\n4.7,3.2\n")
    table = read_table(path)
    assert table.attrs["notes"] == [
        "1 of 3 rows have fewer fields than the header's 4 (2 fields; line 5): the fields they lack are read as missing"
    ]
    # a row lacking only a trailing column without a name (dropped, being empty) loses nothing
    path.write_text("a,b,\n1,2,\n3,4\n5,6,\n")
    assert read_table(path).attrs["notes"] == ["dropped 1 empty column(s) without a header name"]


@st.composite
def _cut_tables(draw):
    rows = draw(st.integers(1, 30))
    width = draw(st.integers(2, 6))
    cut = draw(st.dictionaries(st.integers(0, rows - 1), st.integers(1, width - 1), max_size=rows))
    quoted = draw(st.booleans())  # a text field holding the delimiter, a line break and a doubled quote
    blank = draw(st.sets(st.integers(1, rows), max_size=3))  # blank lines before these records
    ending = draw(st.sampled_from(["\n", "\r\n"]))
    last_break = draw(st.booleans())
    block = draw(st.sampled_from([3, 7, 64, 1 << 22]))  # bytes per block of the scan
    return rows, width, cut, quoted, blank, ending, last_break, block


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(_cut_tables())
def test_every_short_row_is_counted_and_the_frame_is_what_pandas_reads(tmp_path, monkeypatch, case):
    rows, width, cut, quoted, blank, ending, last_break, block = case
    monkeypatch.setattr(tables, "_SCAN_BYTES", block)
    records = [[f"c{j}" for j in range(width)]]
    for i in range(rows):
        record = [f"{i}.{j}5" if not quoted or j else f'row {i}, "{i}"\nsecond line' for j in range(width)]
        records.append(record[: cut.get(i, width)])
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator=ending)
    for i, record in enumerate(records):
        if i in blank:
            buffer.write(ending)
        writer.writerow(record)
    text = buffer.getvalue() if last_break else buffer.getvalue()[: -len(ending)]
    path = tmp_path / "cut.csv"
    path.write_bytes(text.encode())
    table = read_table(path)
    pd.testing.assert_frame_equal(table, pd.read_csv(path))  # reference: pandas.read_csv
    # reference: Python's csv module, record by record
    expected = tables._record_widths_csv(path, ",")
    got = tables._record_widths(path, ",")
    np.testing.assert_array_equal(got[0], expected[0])
    np.testing.assert_array_equal(got[1], expected[1])
    notes = table.attrs.get("notes", [])
    if not cut:
        assert notes == []
        return
    assert len(notes) == 1 and notes[0].startswith(f"{len(cut)} of {rows} rows have fewer fields")
    shown = expected[0][sorted(cut)][:5]
    assert f"line{'s' if len(cut) > 1 else ''} {', '.join(map(str, shown))}" in notes[0]


def test_a_quote_inside_an_unquoted_field_falls_back_to_the_csv_reader(tmp_path):
    # 12" and 4" are inches: pandas (and the csv module) read a quote inside an unquoted field as a character
    path = tmp_path / "inches.csv"
    path.write_text('width,height,label\n12",4",crate\n5,6\n7,8,box\n')
    assert tables._record_widths(path, ",")[1].tolist() == [2, 2, 3]  # the fast scan is fooled ...
    table = read_table(path)
    assert table.loc[0, "label"] == "crate"
    assert table.attrs["notes"] == [  # ... and the note comes from the csv reader
        "1 of 3 rows have fewer fields than the header's 3 (2 fields; line 3): the fields they lack are read as missing"
    ]


# -- rows without a target ----------------------------------------------------------------------
def test_rows_without_a_target_are_counted_and_profile_and_objective_leave_the_same_rows_out():
    frame = _iris()
    gone = np.random.default_rng(0).choice(150, 30, replace=False)  # 20 % of the rows
    holed = frame.astype({"target": float})
    holed.loc[gone, "target"] = np.nan
    cleaned = clean_table(holed, "target")
    assert cleaned.notes == ("30 of 150 rows (20.0 %) have no value in the target column 'target': left out",)
    # reference: the same table with those rows removed by hand
    by_hand = holed.drop(index=gone)
    pd.testing.assert_frame_equal(cleaned.frame, by_hand)
    _same_profile(profile(holed, "target"), profile(by_hand, "target"))
    objective = cv_objective(holed, "target", "knn", cv=5)
    assert objective.data_notes == cleaned.notes and len(objective.X) == 120
    assert objective(KNN).score == cv_objective(by_hand, "target", "knn", cv=5)(KNN).score


def test_an_infinite_regression_target_leaves_its_row_out_with_a_note():
    frame = load_diabetes(as_frame=True).frame
    frame.loc[[4, 40], "target"] = [np.inf, -np.inf]
    cleaned = clean_table(frame, "target")
    assert cleaned.notes == ("2 of 442 rows (0.5 %) have an infinite value in the target column 'target': left out",)
    assert len(cleaned.frame) == 440 and np.isfinite(cleaned.frame["target"]).all()
    objective = cv_objective(frame, "target", "ridge", cv=3)
    assert objective({"alpha": 1.0}).status == "ok"


def test_a_target_missing_everywhere_is_refused():
    frame = _iris().assign(target=np.nan)
    with pytest.raises(TableError, match=r"target column 'target' is missing in all 150 rows"):
        clean_table(frame, "target")
    with pytest.raises(ObjectiveError, match=r"target column 'target' is missing in all 150 rows"):
        cv_objective(frame, "target", "knn")
    with pytest.raises(ProfileError, match=r"target column 'target' is missing in all 150 rows"):
        profile(frame, "target")


# -- labels that differ only in case or surrounding spaces ---------------------------------------
def _cancer_yes_no() -> pd.DataFrame:
    """Breast cancer table with target 'malignant' as yes/no text (0 = malignant in scikit-learn's coding)."""
    frame = load_breast_cancer(as_frame=True).frame
    return frame.assign(malignant=np.where(frame.pop("target") == 0, "yes", "no"))


def test_yes_and_Yes_with_a_space_become_one_class_in_profile_and_objective():
    frame = _cancer_yes_no()
    messy = frame.copy()
    rows = np.flatnonzero(messy["malignant"] == "yes")[::4]  # every fourth 'yes' written 'Yes '
    messy.loc[rows, "malignant"] = "Yes "
    messy.loc[np.flatnonzero(messy["malignant"] == "no")[:1], "malignant"] = "NO"
    cleaned = clean_table(messy, "malignant")
    n_yes, n_no = int((frame["malignant"] == "yes").sum()), int((frame["malignant"] == "no").sum())
    assert cleaned.notes == (
        "target 'malignant': labels that differ only in case or surrounding spaces were merged: "
        f"'yes' ({n_yes - len(rows)} rows) and 'Yes ' ({len(rows)} rows) as 'yes'; "
        f"'no' ({n_no - 1} rows) and 'NO' (1 row) as 'no'",
    )
    # reference: the table as it was before the labels were misspelt
    pd.testing.assert_series_equal(cleaned.frame["malignant"], frame["malignant"])
    _same_profile(profile(messy, "malignant"), profile(frame, "malignant"))
    objective = cv_objective(messy, "malignant", "knn", cv=5)
    assert sorted(set(objective.y)) == ["no", "yes"]
    assert objective(KNN).score == cv_objective(frame, "malignant", "knn", cv=5)(KNN).score
    assert messy.loc[rows[0], "malignant"] == "Yes "  # the input is not changed


def test_a_trimmed_spelling_wins_even_when_rarer_and_numeric_targets_are_never_touched():
    y = ["Late "] * 5 + ["late"] * 2 + [" LATE"] * 1 + ["on time"] * 8
    frame = pd.DataFrame({"x": np.arange(16.0) % 5, "status": y})
    cleaned = clean_table(frame, "status")
    assert cleaned.frame["status"].tolist() == ["late"] * 8 + ["on time"] * 8
    assert "'late' (2 rows), 'Late ' (5 rows) and ' LATE' (1 row) as 'late'" in cleaned.notes[0]
    numeric = pd.DataFrame({"x": np.arange(16.0) % 5, "y": [0, 1] * 8})
    cleaned = clean_table(numeric, "y")
    assert cleaned.notes == () and cleaned.frame is numeric


@settings(max_examples=100, deadline=None)
@given(st.lists(st.sampled_from(["yes", "Yes", "YES ", " yes", "no", "No ", "maybe", None]), min_size=1, max_size=40))
def test_merging_keeps_every_row_and_leaves_one_spelling_per_label(labels):
    frame = pd.DataFrame({"x": np.arange(len(labels), dtype=float), "answer": pd.Series(labels, dtype="str")})
    if frame["answer"].isna().all():
        with pytest.raises(TableError, match="missing in all"):
            clean_table(frame, "answer")
        return
    out = clean_table(frame, "answer").frame["answer"]
    given_ = frame["answer"].dropna()
    assert len(out) == len(given_)  # rows without a label go, every other row stays
    keys = given_.str.strip().str.casefold()
    assert out.nunique() == keys.nunique()  # one spelling per label
    assert set(out) <= set(given_)  # a spelling that was written, never an invented one
    # each label keeps all the rows of all its spellings
    assert (out.str.strip().str.casefold().to_numpy() == keys.to_numpy()).all()


# -- feature values and columns --------------------------------------------------------------
def test_infinite_values_become_missing_and_every_trial_can_run():
    frame = _iris()
    frame["ratio"] = frame["sepal length (cm)"] / (frame["petal width (cm)"] - 0.2)  # invented: 0.2 gives inf
    n_inf = int(np.isinf(frame["ratio"]).sum())
    assert n_inf > 0
    cleaned = clean_table(frame, "target")
    assert cleaned.notes == (f"column 'ratio': {n_inf} infinite value(s) read as missing",)
    # reference: the same values made missing by hand
    by_hand = frame.assign(ratio=frame["ratio"].replace([np.inf, -np.inf], np.nan))
    pd.testing.assert_frame_equal(cleaned.frame, by_hand)
    _same_profile(profile(frame, "target"), profile(by_hand, "target"))
    result = cv_objective(frame, "target", "knn", cv=5)(KNN)
    assert result.status == "ok" and result.score == cv_objective(by_hand, "target", "knn", cv=5)(KNN).score


def test_an_all_missing_and_a_constant_column_are_named_and_kept():
    frame = _iris().assign(depot=np.nan, site="Larkspur", batch=3)  # invented columns
    frame["all_inf"] = np.inf
    cleaned = clean_table(frame, "target")
    assert cleaned.notes == (
        "column 'depot' has no value in any of the 150 rows: kept, though a model learns nothing from it",
        "column 'site' holds the same value ('Larkspur') in all 150 rows: kept, though a model learns nothing from it",
        "column 'batch' holds the same value (3) in all 150 rows: kept, though a model learns nothing from it",
        "column 'all_inf': 150 infinite value(s) read as missing",
        "column 'all_inf' has no value in any of the 150 rows: kept, though a model learns nothing from it",
    )
    assert list(cleaned.frame.columns) == list(frame.columns)
    # reference: k-nearest neighbours scores as without them (an empty or constant column adds no distance)
    plain = cv_objective(_iris(), "target", "knn", cv=5)(KNN).score
    assert cv_objective(frame, "target", "knn", cv=5)(KNN).score == plain


def test_a_column_constant_only_where_the_target_is_present_is_named():
    frame = _iris().assign(depot=1.0)
    frame.loc[[0, 1], ["depot", "target"]] = [2.0, np.nan]  # the other value sits on rows without a target
    notes = clean_table(frame, "target").notes
    assert notes[1] == ("column 'depot' holds the same value (1.0) in all 148 rows: "
                        "kept, though a model learns nothing from it")


def test_a_clean_table_gets_no_note_and_is_returned_as_it_is(tmp_path):
    frame = _iris()
    cleaned = clean_table(frame, "target")
    assert cleaned.notes == () and cleaned.column_notes == {} and cleaned.frame is frame
    path = tmp_path / "iris.csv"
    frame.to_csv(path, index=False)
    assert "notes" not in read_table(path).attrs


# -- commands ------------------------------------------------------------------------------------
def _run(archive, *args):
    return CliRunner().invoke(main, ["--archive", str(archive), *map(str, args)])


@pytest.fixture
def messy_files(tmp_path):
    """One file per case, each from iris with one thing wrong."""
    iris = _iris()
    files = {}
    lines = _short_rows_csv(tmp_path / "short_rows.csv", iris, {i: 3 for i in range(0, 150, 10)})
    files["short_rows"] = (tmp_path / "short_rows.csv",
                           f"15 of 150 rows have fewer fields than the header's 5 (3 fields; lines "
                           f"{', '.join(map(str, lines[:5]))} ...)")
    holed = iris.astype({"target": float})
    holed.loc[::5, "target"] = np.nan
    files["no_target"] = (holed, "30 of 150 rows (20.0 %) have no value in the target column 'target': left out")
    labelled = iris.assign(target=iris["target"].map({0: "setosa", 1: "versicolor", 2: "virginica"}))
    labelled.loc[:9, "target"] = "Setosa "
    files["labels"] = (labelled, "'setosa' (40 rows) and 'Setosa ' (10 rows) as 'setosa'")
    files["all_missing"] = (iris.assign(depot=np.nan), "column 'depot' has no value in any of the 150 rows")
    with_inf = iris.copy()
    with_inf.loc[[3, 7], "petal width (cm)"] = np.inf
    files["infinite"] = (with_inf, "column 'petal width (cm)': 2 infinite value(s) read as missing")
    files["constant"] = (iris.assign(site="Larkspur"), "column 'site' holds the same value ('Larkspur') in all 150 rows")
    out = {}
    for case, (data, note) in files.items():
        path = data if not isinstance(data, pd.DataFrame) else tmp_path / f"{case}.csv"
        if isinstance(data, pd.DataFrame):
            data.to_csv(path, index=False)
        out[case] = (path, note)
    return out


CASES = ["short_rows", "no_target", "labels", "all_missing", "infinite", "constant"]


@pytest.mark.parametrize("case", CASES)
def test_profile_prints_a_note_and_strict_refuses_the_file(tmp_path, messy_files, case):
    path, note = messy_files[case]
    done = _run(tmp_path / "a.duckdb", "profile", path, "--target", "target")
    assert done.exit_code == 0, done.output
    assert f"note: {path}: " in done.stderr and note in done.stderr
    refused = _run(tmp_path / "a.duckdb", "profile", path, "--target", "target", "--strict")
    assert refused.exit_code == 1 and refused.stdout == ""
    assert refused.stderr.startswith(f"Error: {path}: refused (--strict); reading it found:")
    assert note in refused.stderr and "note:" not in refused.stderr and "Traceback" not in refused.stderr


def test_a_clean_file_gets_no_note_from_profile_nor_tune(tmp_path):
    path = tmp_path / "iris.csv"
    _iris().to_csv(path, index=False)
    done = _run(tmp_path / "a.duckdb", "profile", path, "--target", "target", "--strict")
    assert done.exit_code == 0 and "note:" not in done.stderr
    tuned = _run(tmp_path / "a.duckdb", "tune", path, "--target", "target", "--learner", "knn", "--budget", "2",
                 "--cold", "--strict")
    assert tuned.exit_code == 0, tuned.output
    assert "note:" not in tuned.stderr


def test_tune_strict_refuses_and_leaves_the_archive_as_it_was(tmp_path, messy_files, table_dump):
    archive = tmp_path / "a.duckdb"
    assert _run(archive, "init").exit_code == 0
    before = table_dump(archive)
    for case in CASES:
        path, note = messy_files[case]
        refused = _run(archive, "tune", path, "--target", "target", "--learner", "knn", "--budget", "2", "--strict")
        assert refused.exit_code == 1, (case, refused.output)
        assert refused.stderr.startswith(f"Error: {path}: refused (--strict)") and note in refused.stderr
        assert table_dump(archive) == before  # no task, no study, no trial
    # without --strict the same file is tuned, with its notes on stderr
    path, note = messy_files["labels"]
    tuned = _run(archive, "tune", path, "--target", "target", "--learner", "knn", "--budget", "2", "--cold")
    assert tuned.exit_code == 0, tuned.output
    assert f"note: {path}: target 'target': labels that differ only in case" in tuned.stderr
    with Archive(archive, read_only=True) as opened:
        assert opened.trials(1)["status"].tolist() == ["ok", "ok"]


def test_tune_with_missing_targets_says_so_and_scores_the_other_rows(tmp_path, messy_files):
    path, note = messy_files["no_target"]
    tuned = _run(tmp_path / "a.duckdb", "tune", path, "--target", "target", "--learner", "knn", "--budget", "2",
                 "--cold")
    assert tuned.exit_code == 0, tuned.output
    assert f"note: {path}: {note}" in tuned.stderr


@pytest.mark.parametrize("command", [
    ["neighbors", "{data}", "--target", "target", "--learner", "knn"],
    ["defaults", "--learner", "knn", "--near", "{data}", "--target", "target"],
    ["prior", "{data}", "--target", "target", "--learner", "knn"],
    ["gain", "--data", "{data}", "--target", "target", "--learner", "knn", "--repeats", "2"],
    ["ingest", "{trials}", "--task", "iris", "--data", "{data}", "--target", "target", "--learner", "knn"],
])
def test_every_command_that_reads_data_takes_strict(tmp_path, messy_files, table_dump, command):
    archive = tmp_path / "a.duckdb"
    assert _run(archive, "init").exit_code == 0
    before = table_dump(archive)
    path, note = messy_files["no_target"]
    trials = tmp_path / "trials.csv"
    pd.DataFrame({"n_neighbors": [3, 9], "score": [0.9, 0.95]}).to_csv(trials, index=False)
    args = [a.format(data=path, trials=trials) for a in command]
    refused = _run(archive, *args, "--strict")
    assert refused.exit_code == 1, refused.output
    assert refused.stderr.startswith(f"Error: {path}: refused (--strict)") and note in refused.stderr
    assert table_dump(archive) == before
    assert "--strict" in _run(archive, command[0], "--help").stdout


def test_ingest_names_short_rows_of_the_trials_file(tmp_path):
    data = tmp_path / "iris.csv"
    _iris().to_csv(data, index=False)
    trials = tmp_path / "trials.csv"
    trials.write_text("n_neighbors,weights,score\n3,uniform,0.9\n9,distance\n15,uniform,0.93\n")
    args = ["ingest", trials, "--task", "iris", "--data", data, "--target", "target", "--learner", "knn"]
    refused = _run(tmp_path / "a.duckdb", *args, "--strict")
    assert refused.exit_code == 1
    assert "1 of 3 rows have fewer fields than the header's 3 (2 fields; line 3)" in refused.stderr
