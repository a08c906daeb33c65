"""Reading tables from CSV, TSV, Parquet and JSON files, messy ones included.

The messy files below hold invented data: the timetable and fares of a
fictional ferry company, Nordhavn Ferries.
"""

from __future__ import annotations

import gzip
import re

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pandas.testing import assert_frame_equal

from warmstart.data import read as tables
from warmstart.errors import WarmstartError
from warmstart.data.read import TableError, column_not_found, read_table

FRAME = pd.DataFrame({"C": [0.5, 2.0, 8.0], "kernel": ["rbf", "poly", "rbf"], "score": [0.9, 0.8, 0.7]})


@pytest.mark.parametrize("name", ["t.csv", "t.tsv", "t.txt", "t.parquet", "t.pq", "t.jsonl", "t.ndjson", "t.json", "t.csv.gz", "t.jsonl.gz"])
def test_read_every_format(tmp_path, name):
    path = tmp_path / name
    if ".parquet" in name or name.endswith(".pq"):
        FRAME.to_parquet(path)
    elif "json" in name:
        FRAME.to_json(path, orient="records", lines=True)
    else:
        FRAME.to_csv(path, sep="\t" if name.endswith((".tsv", ".txt")) else ",", index=False)
    frame = read_table(path)
    assert list(frame.columns) == ["C", "kernel", "score"]
    assert frame["C"].tolist() == [0.5, 2.0, 8.0]
    assert frame["kernel"].tolist() == ["rbf", "poly", "rbf"]


def test_upper_case_extension(tmp_path):
    path = tmp_path / "T.CSV"
    FRAME.to_csv(path, index=False)
    assert read_table(path).shape == (3, 3)


def test_json_lines_keeps_numeric_keys_as_text(tmp_path):
    path = tmp_path / "t.jsonl"
    path.write_text('{"1": 0.5, "score": 1}\n{"1": 0.7, "score": 2}\n')
    assert list(read_table(path).columns) == ["1", "score"]


def _write(path, content):
    path.write_bytes(content if isinstance(content, bytes) else content.encode())
    return path


@pytest.mark.parametrize(
    "name, content, match",
    [
        ("t.xlsx", "a,b\n1,2\n", r"t\.xlsx: cannot tell the format from the extension '\.xlsx'; use one of .*\.csv"),
        ("t", "a,b\n1,2\n", r"cannot tell the format from the extension ''"),
        ("t.csv", "", r"t\.csv: the file is empty"),
        ("t.csv", "a,b\n", r"t\.csv: the table has a header but no rows"),
        ("t.csv", "\n\n", r"t\.csv: not a valid CSV file"),
        ("t.csv", 'a,b\n1,"2\n', r"t\.csv: not a valid CSV file \(.*EOF inside string"),
        ("t.csv", "a,b\n1,2\n3,4,5\n", r"t\.csv: not a valid CSV file \(.*Expected 2 fields in line 3, saw 3"),
        ("t.csv", "a,b\n1,2,3\n4,5\n", r"t\.csv: not a valid CSV file \(a row has more fields than the header"),
        ("t.csv", b"\xff\xfe\x00a,b\n1,2\n", r"t\.csv: not a valid CSV file"),
        ("t.jsonl", '{"a": 1}\n{"a": \n', r"t\.jsonl: not a valid JSON lines file"),
        ("t.jsonl", '{"a": 1}\nnot json\n', r"t\.jsonl: not a valid JSON lines file"),
        ("t.json", "[[1, 2], [3, 4]]\n", r"t\.json: not a valid JSON file: every row must be a JSON object, e\.g\. \[\{"),
        ("t.jsonl", "1\n2\n", r"t\.jsonl: not a valid JSON lines file: every line must be one JSON object"),
        ("t.parquet", "PAR1 but not really", r"t\.parquet: not a valid Parquet file"),
        ("t.parquet", "a,b\n1,2\n", r"t\.parquet: not a valid Parquet file"),
    ],
)
def test_bad_files_get_clear_errors(tmp_path, name, content, match):
    with pytest.raises(TableError, match=match):
        read_table(_write(tmp_path / name, content))


def test_header_only_parquet(tmp_path):
    path = tmp_path / "t.parquet"
    FRAME.iloc[:0].to_parquet(path)
    with pytest.raises(TableError, match=r"t\.parquet: the table has a header but no rows"):
        read_table(path)


def test_broken_gzip(tmp_path):
    path = _write(tmp_path / "t.csv.gz", gzip.compress(b"a,b\n1,2\n")[:-12])
    with pytest.raises(TableError, match=r"t\.csv\.gz: not a valid CSV file"):
        read_table(path)


def test_missing_file_and_directory(tmp_path):
    with pytest.raises(TableError, match=r"nothere\.csv: no such file"):
        read_table(tmp_path / "nothere.csv")
    (tmp_path / "folder.csv").mkdir()
    with pytest.raises(TableError, match=r"folder\.csv: is a directory, expected a CSV file"):
        read_table(tmp_path / "folder.csv")


def test_table_error_is_a_warmstart_error():
    assert issubclass(TableError, WarmstartError)



# -- messy files as people write them (Nordhavn Ferries: invented) -----------------
FARES = pd.DataFrame({
    "route": ["harbour-isle", "isle-point", "point-harbour"],
    "fare_eur": [3.5, 12.25, -0.75],
    "seats": [120, 80, 64],
})


@pytest.mark.parametrize("name", ["fares.csv", "fares.csv.gz", "fares.txt", "fares.tsv"])
def test_semicolon_and_decimal_comma(tmp_path, name):
    # as a spreadsheet in continental Europe saves it: ';' between fields, ',' before decimals
    text = "route;fare_eur;seats\nharbour-isle;3,5;120\nisle-point;12,25;80\npoint-harbour;-0,75;64\n"
    path = _write(tmp_path / name, gzip.compress(text.encode()) if name.endswith(".gz") else text)
    frame = read_table(path)
    assert_frame_equal(frame, FARES, check_dtype=False)
    assert frame["fare_eur"].dtype == np.float64 and frame["seats"].dtype == np.int64
    assert frame.attrs["notes"] == ["read as semicolon-separated (';') with decimal commas"]


@pytest.mark.parametrize("sep", ["\t", "|", ";"])
def test_other_delimiters_in_a_csv_file(tmp_path, sep):
    path = tmp_path / "fares.csv"
    FARES.to_csv(path, sep=sep, index=False)  # decimal points, whatever the delimiter
    assert_frame_equal(read_table(path), FARES, check_dtype=False)


def test_comma_separated_txt_file(tmp_path):
    path = tmp_path / "fares.txt"
    FARES.to_csv(path, index=False)
    assert_frame_equal(read_table(path), FARES, check_dtype=False)


def test_comma_file_keeps_semicolons_inside_values(tmp_path):
    path = _write(tmp_path / "notes.csv", 'route,remark,fare\nharbour-isle,"calm; on time",3.5\nisle-point,windy; late,4\n')
    frame = read_table(path)
    assert frame["remark"].tolist() == ["calm; on time", "windy; late"]
    assert "notes" not in frame.attrs


def test_semicolon_file_with_a_bad_row_names_the_row(tmp_path):
    path = _write(tmp_path / "fares.csv", "route;fare_eur\nharbour-isle;3,5\nisle-point;4,0\npoint-harbour;2,5;9\n")
    with pytest.raises(TableError, match=r"fares\.csv: not a valid CSV file \(.*Expected 2 fields in line 4, saw 3"):
        read_table(path)


def test_one_column_that_looks_semicolon_separated_is_refused(tmp_path, monkeypatch):
    # a header longer than the sample the delimiter is guessed from (here 4 bytes) leaves the
    # extension's comma; the table then reads as one column whose name holds the semicolons
    monkeypatch.setattr(tables, "_SAMPLE_BYTES", 4)
    path = _write(tmp_path / "fares.csv", "route;seats\nharbour-isle;120\n")
    looks = r"fares\.csv: .*one column named 'route;seats', which looks semicolon-separated \(';'\)"
    with pytest.raises(TableError, match=looks):
        read_table(path)
    # a quoted name may hold a semicolon
    assert list(read_table(_write(tmp_path / "q.csv", '"route;seats"\nharbour-isle\n')).columns) == ["route;seats"]


_fare_columns = st.lists(
    st.sampled_from(["fare_eur", "crossing_min", "seats", "cars", "wind_ms", "delay_min"]), min_size=2, max_size=4, unique=True
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data(), columns=_fare_columns, rows=st.integers(1, 12), sep=st.sampled_from([",", ";", "\t", "|"]))
def test_round_trip_of_numeric_tables(tmp_path, data, columns, rows, sep):
    # pandas writes the file (';' with decimal commas, as continental spreadsheets do); reading it
    # back must give the same frame
    cells = {}
    for name in columns:
        if data.draw(st.booleans(), label=f"{name} is whole numbers"):
            cells[name] = data.draw(st.lists(st.integers(-10**6, 10**6), min_size=rows, max_size=rows))
        else:
            floats = st.floats(allow_infinity=False, allow_nan=True, width=64)
            cells[name] = data.draw(st.lists(floats, min_size=rows, max_size=rows))
    frame = pd.DataFrame(cells)
    frame = frame.astype({c: np.float64 for c in frame.columns if frame[c].dtype != np.int64})
    path = tmp_path / "crossings.csv"
    frame.to_csv(path, sep=sep, decimal="," if sep == ";" else ".", index=False)
    assert_frame_equal(read_table(path), frame)


def test_missing_value_markers(tmp_path):
    path = _write(
        tmp_path / "crossings.csv",
        "route,delay_min,crew,captain\n"
        "harbour-isle,?,4,n/a\nisle-point,-,NA,null\npoint-harbour,na,NULL,none\nharbour-point,7,,N/A\n",
    )
    frame = read_table(path)
    assert frame["delay_min"].isna().tolist() == [True, True, True, False] and frame["delay_min"].dtype == np.float64
    assert frame["crew"].isna().tolist() == [False, True, True, True] and frame["crew"].dtype == np.float64
    # "none" stays text: it is a level of built-in choices (class_weight) and of everyday categories
    assert frame["captain"].isna().tolist() == [True, True, False, True] and frame["captain"].iloc[2] == "none"


def test_negative_numbers_are_not_missing(tmp_path):
    frame = read_table(_write(tmp_path / "t.csv", "route,delta\nharbour-isle,-3\nisle-point,-\n"))
    assert frame["delta"].tolist()[0] == -3 and frame["delta"].isna().tolist() == [False, True]


def test_thousands_separators(tmp_path):
    path = _write(
        tmp_path / "passengers.csv",
        'route,passengers,revenue_eur,ticket_code,remark\n'
        'harbour-isle,"6,571","1,234.5","1,2",busy\n'
        'isle-point,912,87.25,"3,4","2,000"\n'
        'point-harbour,?,"12,345,678",5,n/a\n',
    )
    frame = read_table(path)
    assert frame["passengers"].tolist()[:2] == [6571, 912] and frame["passengers"].isna().tolist()[2]
    assert frame["revenue_eur"].tolist() == [1234.5, 87.25, 12345678.0]
    # "1,2" is not a thousands group, and a column holding a word stays text
    assert frame["ticket_code"].tolist() == ["1,2", "3,4", "5"]
    assert frame["remark"].tolist()[:2] == ["busy", "2,000"]
    assert frame.attrs["notes"] == ["read column(s) ['passengers', 'revenue_eur'] as numbers with thousands separators"]


def test_thousands_points_with_decimal_commas(tmp_path):
    text = "route;revenue_eur\nharbour-isle;1.234,5\nisle-point;87,25\npoint-harbour;12.345.678\n"
    path = _write(tmp_path / "revenue.csv", text)
    assert read_table(path)["revenue_eur"].tolist() == [1234.5, 87.25, 12345678.0]


def test_empty_columns_without_a_name_are_dropped(tmp_path):
    # a spreadsheet export with two empty columns after the last one
    path = _write(tmp_path / "fares.csv", "route,fare_eur,,\nharbour-isle,3.5,,\nisle-point,12.25,,\n")
    frame = read_table(path)
    assert list(frame.columns) == ["route", "fare_eur"]
    assert frame.attrs["notes"] == ["dropped 2 empty column(s) without a header name"]
    # a column without a name that holds values is kept, and so is an empty named one
    frame = read_table(_write(tmp_path / "kept.csv", "route,,remark\nharbour-isle,7,\nisle-point,,\n"))
    assert list(frame.columns) == ["route", "Unnamed: 1", "remark"]


@pytest.mark.parametrize("header, repeated", [("route,fare,fare", "['fare']"), ("a;b;a;b;c", "['a', 'b']")])
def test_repeated_column_names_are_refused(tmp_path, header, repeated):
    sep = ";" if ";" in header else ","
    row = sep.join(str(j) for j in range(header.count(sep) + 1))
    path = _write(tmp_path / "fares.csv", f"{header}\n{row}\n")
    with pytest.raises(TableError, match=rf"fares\.csv: the header names column\(s\) {re.escape(repeated)} more than once"):
        read_table(path)


def test_a_name_that_looks_renamed_is_not_a_repeat(tmp_path):
    frame = read_table(_write(tmp_path / "fares.csv", "fare,fare.1\n3.5,4\n"))
    assert list(frame.columns) == ["fare", "fare.1"]


@pytest.mark.parametrize("name", ["sailings.json", "sailings.json.gz"])
def test_json_array_of_records(tmp_path, name):
    text = (
        ' \n[{"route": "harbour-isle", "fare_eur": 3.5, "night": true},\n'
        ' {"route": "isle-point", "fare_eur": 12, "night": false}]\n'
    )
    path = _write(tmp_path / name, gzip.compress(text.encode()) if name.endswith(".gz") else text)
    frame = read_table(path)
    assert frame.to_dict("list") == {"route": ["harbour-isle", "isle-point"], "fare_eur": [3.5, 12.0], "night": [True, False]}


def test_json_file_may_still_hold_json_lines(tmp_path):
    text = '{"route": "harbour-isle", "fare_eur": 3.5}\n{"route": "isle-point", "fare_eur": 4}\n'
    path = _write(tmp_path / "sailings.json", text)
    assert read_table(path)["fare_eur"].tolist() == [3.5, 4]


def test_empty_json_array(tmp_path):
    with pytest.raises(TableError, match=r"sailings\.json: the table has a header but no rows"):
        read_table(_write(tmp_path / "sailings.json", "[]"))


def test_column_not_found_suggests_a_close_name():
    columns = ["route", "Fare_EUR", "passengers"]
    assert column_not_found("fare_eur", columns).endswith("; did you mean 'Fare_EUR'?")
    assert column_not_found("pasengers", columns).endswith("; did you mean 'passengers'?")
    assert column_not_found("route ", columns).endswith("; did you mean 'route'?")
    assert column_not_found("captain", columns) == (
        "target column 'captain' not found; columns are ['route', 'Fare_EUR', 'passengers']"
    )
    assert column_not_found("x", ["a"], what="column").startswith("column 'x' not found")


def test_suspect_columns_flags_identifiers_and_text_dates_but_not_real_features():
    # scikit-learn's bundled wine table (UCI) with invented columns added
    from sklearn.datasets import load_wine

    from warmstart.data.features import suspect_columns

    frame = load_wine(as_frame=True).frame
    n = len(frame)
    frame["row_no"] = np.random.default_rng(0).permutation(n) + 1  # a shuffled row number, named as one
    frame["booking"] = [f"BK-{1000 + 7 * i}" for i in range(n)]  # text, one value per row
    frame["day"] = pd.date_range("2025-01-01", periods=n).strftime("%Y-%m-%d")  # dates as text
    frame["ticket_no"] = 1000 + 7 * np.arange(n)  # whole numbers rising on every row, an identifier's name
    frame["line"] = np.arange(1, n + 1)  # 1, 2, 3 ... in row order: a row number whatever its name
    frame["year"] = 1800 + np.arange(n)  # rising whole numbers under a feature's name: kept
    frame["rank"] = np.random.default_rng(1).permutation(n) + 1  # a shuffled 1..n without an id's name: kept
    found = suspect_columns(frame, exclude=["target"])
    assert set(found) == {"row_no", "booking", "day", "ticket_no", "line"}
    assert "row number" in found["line"] and "identifier" in found["row_no"] and "dates" in found["day"]
    # the 13 measured wine features (several all distinct, e.g. 'proline' has repeats, none rising) pass
    assert not suspect_columns(load_wine(as_frame=True).frame, exclude=["target"])
