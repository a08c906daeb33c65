"""Reading tables from files: CSV, TSV, Parquet and JSON lines, by extension."""

from __future__ import annotations

import lzma
import warnings
import zlib
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
        with warnings.catch_warnings():
            # A row with more fields than the header would silently become the
            # index (shifting every value one column left): refuse it instead.
            warnings.simplefilter("error", pd.errors.ParserWarning)
            if kind in ("CSV", "TSV"):
                frame = pd.read_csv(path, sep="," if kind == "CSV" else "\t", index_col=False, low_memory=False)
            elif kind == "Parquet":
                frame = pd.read_parquet(path)
            else:
                # JSON types as written: exact floats, keys such as "1" kept as text, no guessing
                # (the default guesser would turn [3, true] into [3, 1] and date-like text into times)
                frame = pd.read_json(path, lines=True, convert_axes=False, dtype=False, precise_float=True)
    except pd.errors.ParserWarning as exc:
        raise TableError(f"{path}: not a valid {kind} file (a row has more fields than the header: {exc})") from None
    except (ValueError, pd.errors.ParserError, UnicodeDecodeError, OSError, EOFError, zlib.error, lzma.LZMAError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise TableError(f"{path}: not a valid {kind} file ({first})") from None
    except Exception as exc:  # pyarrow raises its own types for broken Parquet
        if type(exc).__module__.startswith("pyarrow"):
            raise TableError(f"{path}: not a valid {kind} file ({exc})") from None
        raise
    if kind == "JSON lines" and not all(isinstance(c, str) for c in frame.columns):
        # JSON object keys are always strings; other labels mean a line was an array or a bare value.
        raise TableError(
            f"{path}: not a valid JSON lines file: every line must be one JSON object, "
            'e.g. {"C": 0.5, "score": 0.91} (a JSON array or bare values will not do)'
        )
    if frame.shape[0] == 0:
        raise TableError(f"{path}: the table has a header but no rows")
    frame.columns = [str(c) for c in frame.columns]
    return frame
