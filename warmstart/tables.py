"""Reading tables from files: CSV, TSV, Parquet and JSON lines, by extension."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from warmstart.errors import WarmstartError

__all__ = ["read_table", "TableError", "TABLE_SUFFIXES"]

TABLE_SUFFIXES = {
    ".csv": "CSV",
    ".tsv": "TSV",
    ".txt": "TSV",
    ".parquet": "Parquet",
    ".pq": "Parquet",
    ".jsonl": "JSON lines",
    ".ndjson": "JSON lines",
    ".json": "JSON lines",
}


class TableError(WarmstartError, ValueError):
    """A file cannot be read as a table."""


def _kind(path: Path) -> str:
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in (".gz", ".zip", ".bz2", ".xz", ".zst"):
        suffixes = suffixes[:-1]
    suffix = suffixes[-1] if suffixes else ""
    if suffix not in TABLE_SUFFIXES:
        allowed = ", ".join(sorted(TABLE_SUFFIXES))
        raise TableError(f"{path}: cannot tell the format from the extension {suffix!r}; use one of {allowed}")
    return TABLE_SUFFIXES[suffix]


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a table from a file, choosing the reader by extension.

    Parameters
    ----------
    path : str or Path
        ``.csv``, ``.tsv``/``.txt`` (tab-separated), ``.parquet``/``.pq`` or
        ``.jsonl``/``.ndjson``/``.json`` (one JSON object per line); CSV/TSV
        and JSON lines may be compressed (``.gz`` ...).

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    TableError
        When the file is missing, empty, malformed or of unknown format; the
        message names the file and what went wrong.
    """
    path = Path(path)
    kind = _kind(path)
    if not path.exists():
        raise TableError(f"{path}: no such file")
    if path.is_dir():
        raise TableError(f"{path}: is a directory, expected a {kind} file")
    if path.stat().st_size == 0:
        raise TableError(f"{path}: the file is empty")
    try:
        if kind == "CSV":
            frame = pd.read_csv(path)
        elif kind == "TSV":
            frame = pd.read_csv(path, sep="\t")
        elif kind == "Parquet":
            frame = pd.read_parquet(path)
        else:
            frame = pd.read_json(path, lines=True)
    except (ValueError, pd.errors.ParserError, UnicodeDecodeError, json.JSONDecodeError, OSError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise TableError(f"{path}: not a valid {kind} file ({first})") from None
    except Exception as exc:  # pyarrow raises its own types for broken Parquet
        if type(exc).__module__.startswith("pyarrow"):
            raise TableError(f"{path}: not a valid {kind} file ({exc})") from None
        raise
    if frame.shape[0] == 0:
        raise TableError(f"{path}: the table has a header but no rows")
    frame.columns = [str(c) for c in frame.columns]
    return frame
