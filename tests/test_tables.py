"""Reading tables from CSV, TSV, Parquet and JSON-lines files."""

from __future__ import annotations

import gzip

import pandas as pd
import pytest

from warmstart.errors import WarmstartError
from warmstart.tables import TableError, read_table

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
        ("t.json", '[{"a": 1}, {"a": 2}]\n', r"t\.json: not a valid JSON lines file: every line must be one JSON object"),
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
