"""Reading tables from files: CSV, TSV, Parquet and JSON, by extension.

Text tables are read the way people write them: the delimiter (comma,
semicolon, tab or pipe) is found from the first lines, a semicolon-separated
file with decimal commas ("3,5") reads as numbers, common missing-value
markers become missing, and a column of numbers with thousands separators
("6,571") becomes numeric.
"""

from __future__ import annotations

import bz2
import csv
import difflib
import gzip
import io
import lzma
import re
import warnings
import zipfile
import zlib
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from warmstart.errors import WarmstartError

__all__ = ["DELIMITERS", "MISSING_MARKERS", "TABLE_SUFFIXES", "TableError", "column_not_found", "read_table"]

TABLE_SUFFIXES = {
    ".csv": "CSV",
    ".tsv": "TSV",
    ".txt": "TSV",
    ".parquet": "Parquet",
    ".pq": "Parquet",
    ".jsonl": "JSON lines",
    ".ndjson": "JSON lines",
    ".json": "JSON",
}
#: delimiters a CSV/TSV file may use, and their names in messages
DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}
#: read as missing in CSV/TSV, besides pandas' own markers ("", "NA", "N/A", "null", "NaN", "None" ...);
#: not "none": it is a level of built-in choices (``class_weight``) and of everyday categories
MISSING_MARKERS = ("?", "-", "n/a", "N/A", "NA", "na", "null", "NULL", "")
_SAMPLE_BYTES = 1 << 16  # decompressed text read to find the delimiter and the header
_SAMPLE_ROWS = 50
_LINES_SHOWN = 5  # line numbers a note about short rows gives
_SCAN_BYTES = 1 << 22  # bytes per block of the scan for short rows
_COMPRESSIONS = (".gz", ".zip", ".bz2", ".xz", ".zst")
_UNNAMED = re.compile(r"Unnamed: \d+")


class TableError(WarmstartError, ValueError):
    """A file cannot be read as a table."""


def _kind(path: Path) -> str:
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in _COMPRESSIONS:
        suffixes = suffixes[:-1]
    suffix = suffixes[-1] if suffixes else ""
    if suffix not in TABLE_SUFFIXES:
        allowed = ", ".join(sorted(TABLE_SUFFIXES))
        raise TableError(f"{path}: cannot tell the format from the extension {suffix!r}; use one of {allowed}")
    return TABLE_SUFFIXES[suffix]


def read_table(path: str | Path) -> pd.DataFrame:
    r"""Read a table from a file, choosing the reader by extension.

    Parameters
    ----------
    path : str or Path
        ``.csv``, ``.tsv``/``.txt``, ``.parquet``/``.pq``,
        ``.jsonl``/``.ndjson`` (one JSON object per line) or ``.json`` (a JSON
        array of objects, or JSON lines); CSV/TSV and JSON may be compressed
        (``.gz``, ``.bz2``, ``.xz``, ``.zip``, ``.zst``).

    Returns
    -------
    pandas.DataFrame
        Column names are text. ``attrs["notes"]`` lists what was guessed
        (a delimiter other than the extension's, decimal commas, columns
        dropped or converted), for a command line to print.

    Raises
    ------
    TableError
        When the file is missing, empty, malformed or of unknown format, or
        names a column twice; the message names the file and what went wrong.

    Notes
    -----
    CSV and TSV files (by either extension) may use a comma, semicolon, tab
    or pipe between fields: the delimiter is the one that splits the header
    into two or more fields and the first rows into as many, preferring the
    extension's own (comma for ``.csv``, tab for ``.tsv``/``.txt``). A
    semicolon-separated file whose first lines hold a decimal comma ("3,5") is
    read with decimal commas. ``MISSING_MARKERS`` ("?", "-", "na" ...) and
    pandas' own markers become missing. A text column whose every value is a
    number with thousands separators ("6,571", "1,234.5"; "1.234,5" in a
    decimal-comma file) or a plain number becomes numeric. Columns without a
    header name ("Unnamed: 5" in pandas) that hold no value are dropped. A
    row with fewer fields than the header (a *short row*) reads as missing
    in the fields it lacks, as pandas and R's ``read.csv`` read it, and a note
    counts such rows and gives the first line numbers; a row with more fields
    than the header is refused.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (folder / "fares.csv").write_text("route;fare;seats\nnorth;3,5;120\nsouth;?;80\n")
    >>> read_table(folder / "fares.csv")["fare"].tolist()
    [3.5, nan]
    """
    path = Path(path)
    kind = _kind(path)
    _check_file(path, kind)
    notes: list[str] = []
    frame = _read_kind(path, kind, notes)
    if kind.startswith("JSON"):
        _check_json_rows(frame, path, kind)
    if frame.shape[0] == 0:
        raise TableError(f"{path}: the table has a header but no rows")
    frame.columns = [str(c) for c in frame.columns]
    if notes:
        frame.attrs["notes"] = notes
    return frame


def _check_file(path: Path, kind: str) -> None:
    """Refuse a missing path, a directory and an empty file, naming it."""
    if not path.exists():
        raise TableError(f"{path}: no such file")
    if path.is_dir():
        raise TableError(f"{path}: is a directory, expected a {kind} file")
    if path.stat().st_size == 0:
        raise TableError(f"{path}: the file is empty")


def _read_kind(path: Path, kind: str, notes: list[str]) -> pd.DataFrame:
    """The file read by the reader of its kind; every reader's error becomes a :class:`TableError`."""
    try:
        with warnings.catch_warnings():
            # A row with more fields than the header would silently become the
            # index (shifting every value one column left): refuse it instead.
            warnings.simplefilter("error", pd.errors.ParserWarning)
            if kind in ("CSV", "TSV"):
                frame = _read_text_table(path, kind, notes)
            elif kind == "Parquet":
                frame = pd.read_parquet(path)
            else:
                # JSON types as written: exact floats, keys such as "1" kept as text, no guessing
                # (the default guesser would turn [3, true] into [3, 1] and date-like text into times)
                array = kind == "JSON" and _sample_text(path)[0].lstrip().startswith("[")
                frame = pd.read_json(path, lines=not array, convert_axes=False, dtype=False, precise_float=True)
    except TableError:
        raise
    except pd.errors.ParserWarning as exc:
        raise TableError(f"{path}: not a valid {kind} file (a row has more fields than the header: {exc})") from None
    except (ValueError, pd.errors.ParserError, UnicodeDecodeError, OSError, EOFError, zlib.error, lzma.LZMAError,
            zipfile.BadZipFile, csv.Error) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise TableError(f"{path}: not a valid {kind} file ({first})") from None
    except ImportError as exc:  # .zst needs the zstandard package
        raise TableError(f"{path}: cannot decompress the file ({exc})") from None
    except Exception as exc:  # pyarrow raises its own types for broken Parquet
        if type(exc).__module__.startswith("pyarrow"):
            raise TableError(f"{path}: not a valid {kind} file ({exc})") from None
        raise
    return frame


def _check_json_rows(frame: pd.DataFrame, path: Path, kind: str) -> None:
    """Refuse JSON whose rows were not objects (object keys are always strings)."""
    if all(isinstance(c, str) for c in frame.columns):
        return
    if kind == "JSON":
        raise TableError(
            f"{path}: not a valid JSON file: every row must be a JSON object, e.g. "
            '[{"C": 0.5, "score": 0.91}, ...] or one such object per line (arrays or bare values will not do)'
        )
    raise TableError(
        f"{path}: not a valid JSON lines file: every line must be one JSON object, "
        'e.g. {"C": 0.5, "score": 0.91} (a JSON array or bare values will not do)'
    )


def column_not_found(name: str, columns, what: str = "target column") -> str:
    """Message for a column that a table lacks, with the closest name when one is near.

    Parameters
    ----------
    name : str
        The column asked for.
    columns : iterable
        The table's column names.
    what : str, default "target column"
        What the column is, as the message should call it.

    Returns
    -------
    str
        ``"target column 'Price' not found; columns are [...]"``, followed by
        ``"; did you mean 'price'?"`` when a column differs only in case or
        surrounding spaces, or is a close spelling (``difflib``).

    Examples
    --------
    >>> column_not_found("Fare", ["route", "fare"])
    "target column 'Fare' not found; columns are ['route', 'fare']; did you mean 'fare'?"
    """
    names = [str(c) for c in columns]
    message = f"{what} {name!r} not found; columns are {names}"
    folded: dict[str, str] = {}
    for c in names:
        folded.setdefault(c.strip().casefold(), c)
    key = str(name).strip().casefold()
    close = difflib.get_close_matches(key, list(folded), n=1, cutoff=0.7)
    match = folded.get(key) or (folded[close[0]] if close else None)
    return f"{message}; did you mean {match!r}?" if match is not None else message


# -- CSV and TSV ------------------------------------------------------------
def _read_text_table(path: Path, kind: str, notes: list[str]) -> pd.DataFrame:
    text, more = _sample_text(path)
    default = "," if kind == "CSV" else "\t"
    sep, header = _sniff(text, more, default)
    decimal = "," if sep == ";" and re.search(r"\d,\d", text) else "."
    if sep != default or decimal != ".":
        notes.append(f"read as {DELIMITERS[sep]}-separated ({sep!r})" + (" with decimal commas" if decimal == "," else ""))
    _refuse_repeated_names(path, header)
    frame = pd.read_csv(
        path, sep=sep, decimal=decimal, na_values=list(MISSING_MARKERS), index_col=False, low_memory=False
    )
    if frame.shape[1] == 1:
        _refuse_one_wrong_column(path, kind, str(frame.columns[0]), text, sep)
    empty = [c for c in frame.columns if isinstance(c, str) and _UNNAMED.fullmatch(c) and frame[c].isna().all()]
    if len(empty) == frame.shape[1]:
        empty = []
    short = _short_rows_note(path, sep, frame, [c not in empty for c in frame.columns])
    if empty:
        frame = frame.drop(columns=empty)
        notes.append(f"dropped {len(empty)} empty column(s) without a header name")
    converted = _numbers_with_separators(frame, decimal)
    if converted:
        notes.append(f"read column(s) {converted} as numbers with thousands separators")
    if short:
        notes.append(short)
    return frame


def _short_rows_note(path: Path, sep: str, frame: pd.DataFrame, kept: list[bool]) -> str:
    """A note counting the rows with fewer fields than the header ("" when none).

    ``frame`` is the table as pandas read it (every header field a column)
    and ``kept`` says which columns stay. Only a row that lacks a field of a
    kept column counts (a row lacking only a trailing unnamed empty column
    loses nothing). pandas does not say which rows were short, so the file
    is scanned again (:func:`_record_widths`), and only when some row lacks
    the last kept field.
    """
    if not any(kept):
        return ""
    needed = max(j for j, keep in enumerate(kept) if keep) + 1
    if needed < 2 or not frame.iloc[:, needed - 1].isna().any():
        return ""  # a short row lacks its last fields, so that column is missing there
    try:
        lines, widths = _record_widths(path, sep)
        if not _agrees(frame, widths, needed):  # quotes inside unquoted fields fool the fast scan
            lines, widths = _record_widths_csv(path, sep)
    except (csv.Error, OSError, ValueError, EOFError, zlib.error, lzma.LZMAError, zipfile.BadZipFile):
        return ""  # pandas read the file; a second reading that fails says nothing reliable
    if len(widths) != len(frame):
        return ""
    short = np.flatnonzero(widths < needed)
    if not short.size:
        return ""
    low, high = int(widths[short].min()), int(widths[short].max())
    fields = f"{low} field{'s' if low != 1 else ''}" if low == high else f"{low} to {high} fields"
    shown = ", ".join(str(int(line)) for line in lines[short[:_LINES_SHOWN]])
    shown += " ..." if short.size > _LINES_SHOWN else ""
    return (f"{short.size} of {len(frame)} rows have fewer fields than the header's {needed} "
            f"({fields}; line{'s' if short.size > 1 else ''} {shown}): the fields they lack are read as missing")


def _agrees(frame: pd.DataFrame, widths: np.ndarray, needed: int) -> bool:
    """Whether a scan's field counts fit the table pandas read: as many rows,
    and every row counted short is missing in each field it lacks."""
    if len(widths) != len(frame):
        return False
    short = np.flatnonzero(widths < needed)
    if not short.size:
        return True
    present = frame.iloc[short, :needed].notna().to_numpy()
    lacking = np.arange(needed)[None, :] >= widths[short][:, None]
    return not (present & lacking).any()


def _record_widths(path: Path, sep: str) -> tuple[np.ndarray, np.ndarray]:
    """First line and number of fields of every data record of a text table.

    A vectorised scan of the raw bytes in blocks, looking only at the
    positions of quotes, separators and line breaks: a separator or a line
    break counts when an even number of double quotes precedes it (outside a
    quoted field; quotes doubled inside one keep the count even). Records of
    nothing but spaces are skipped, as pandas skips blank lines; the first
    record is the header. UTF-8 never uses these bytes inside a multi-byte
    character.
    """
    sep_byte, quote, newline = ord(sep), ord('"'), ord("\n")
    inside, line = 0, 1  # quote parity and physical line at the start of the block
    seps, filled, start = 0, False, 1  # the record in progress: separators, a non-blank byte, first line
    starts: list[np.ndarray] = []
    counts: list[np.ndarray] = []
    kept: list[np.ndarray] = []
    with _open_bytes(path) as handle:
        while block := handle.read(_SCAN_BYTES):
            data = np.frombuffer(block, dtype=np.uint8)
            breaks = np.flatnonzero(data == newline)
            separators = np.flatnonzero(data == sep_byte)
            quotes = np.flatnonzero(data == quote)
            ends = breaks
            if quotes.size or inside:
                ends = breaks[((np.searchsorted(quotes, breaks) + inside) & 1) == 0]
                separators = separators[((np.searchsorted(quotes, separators) + inside) & 1) == 0]
            if ends.size:
                before = np.searchsorted(separators, ends)
                count = np.diff(before, prepend=0)
                count[0] += seps
                begins = np.r_[0, ends[:-1] + 1]
                first = line + np.searchsorted(breaks, begins)
                first[0] = start
                nonblank = count > 0
                for i in np.flatnonzero(~nonblank):  # no separator: a blank line, or a row of one field
                    nonblank[i] = bool(block[begins[i]:ends[i]].strip()) or (i == 0 and filled)
                starts.append(first)
                counts.append(count)
                kept.append(nonblank)
                tail = int(ends[-1]) + 1
                seps, filled = int(separators.size - before[-1]), bool(block[tail:].strip())
                start = line + int(np.searchsorted(breaks, tail))
            else:
                seps, filled = seps + int(separators.size), filled or bool(block.strip())
            inside = (inside + int(quotes.size)) & 1
            line += int(breaks.size)
    if seps or filled:  # a last record without a line break after it
        starts.append(np.array([start]))
        counts.append(np.array([seps]))
        kept.append(np.array([True]))
    if not counts:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    records = np.flatnonzero(np.concatenate(kept))[1:]  # the first non-blank record is the header
    return np.concatenate(starts)[records], np.concatenate(counts)[records] + 1


def _record_widths_csv(path: Path, sep: str) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_record_widths` with Python's :mod:`csv` reader (slower; a quote
    inside an unquoted field stays a character, as pandas reads it)."""
    lines: list[int] = []
    widths: list[int] = []
    with _open_bytes(path) as raw, io.TextIOWrapper(raw, encoding="utf-8-sig", errors="replace", newline="") as text:
        reader = csv.reader(text, delimiter=sep)
        header_seen, last_line = False, 0
        for record in reader:
            start, last_line = last_line + 1, reader.line_num
            if not record or (len(record) == 1 and not record[0].strip()):
                continue  # blank lines: pandas skips them too
            if header_seen:
                lines.append(start)
                widths.append(len(record))
            header_seen = True
    return np.array(lines, dtype=np.int64), np.array(widths, dtype=np.int64)


@contextmanager
def _open_bytes(path: Path):
    """The decompressed file as a binary stream."""
    compression = path.suffix.lower()
    if compression == ".zip":
        with zipfile.ZipFile(path) as archive, archive.open(archive.namelist()[0]) as handle:
            yield handle
        return
    if compression == ".zst":
        import zstandard

        opener = zstandard.open
    else:
        opener = {".gz": gzip.open, ".bz2": bz2.open, ".xz": lzma.open}.get(compression, open)
    with opener(path, "rb") as handle:
        yield handle


def _sample_text(path: Path) -> tuple[str, bool]:
    """The first ``_SAMPLE_BYTES`` of the decompressed file as text, and
    whether more follows ("" when the compression cannot be opened here)."""
    compression = path.suffix.lower()
    if compression == ".zip":
        with zipfile.ZipFile(path) as archive:
            names = archive.namelist()
            if len(names) != 1:  # pandas refuses these with its own message
                return "", False
            with archive.open(names[0]) as handle:
                raw = handle.read(_SAMPLE_BYTES + 1)
    else:
        if compression == ".zst":
            try:
                import zstandard
            except ImportError:
                return "", False
            opener = zstandard.open
        else:
            opener = {".gz": gzip.open, ".bz2": bz2.open, ".xz": lzma.open}.get(compression, open)
        with opener(path, "rb") as handle:
            raw = handle.read(_SAMPLE_BYTES + 1)
    more = len(raw) > _SAMPLE_BYTES
    # undecodable bytes are pandas' to report; a character cut at the end is harmless here
    return raw[:_SAMPLE_BYTES].decode("utf-8", errors="replace").removeprefix("\ufeff"), more


def _rows(text: str, delimiter: str) -> list[list[str]]:
    """The first non-blank rows of the sample, split as a CSV reader would."""
    reader = csv.reader(io.StringIO(text), delimiter=delimiter)
    rows = []
    try:
        for row in reader:
            if row and any(row):
                rows.append(row)
                if len(rows) > _SAMPLE_ROWS:
                    break
    except csv.Error:  # an odd sample is pandas' to judge
        pass
    return rows


def _sniff(text: str, more: bool, default: str) -> tuple[str, list[str]]:
    """Delimiter of a text table and its header fields.

    A candidate must split the header into two or more fields; among those,
    the one that splits the most rows into as many fields wins, then the
    extension's own, then the one with the most fields.
    """
    if more:  # the last line of the sample may be cut short
        text = text[: text.rfind("\n") + 1]
    best, best_rank, header = default, None, []
    for delimiter in DELIMITERS:
        rows = _rows(text, delimiter)
        if not rows or len(rows[0]) < 2:
            continue
        width = len(rows[0])
        share = sum(len(r) == width for r in rows[1:]) / (len(rows) - 1) if len(rows) > 1 else 1.0
        rank = (share, delimiter == default, width)
        if best_rank is None or rank > best_rank:
            best, best_rank, header = delimiter, rank, rows[0]
    return best, header


def _refuse_repeated_names(path: Path, header: list[str]) -> None:
    named = [h for h in header if h != ""]
    repeated = sorted({h for h in named if named.count(h) > 1})
    if repeated:
        raise TableError(
            f"{path}: the header names column(s) {repeated} more than once; "
            f"give every column its own name (pandas would rename the second to {repeated[0] + '.1'!r})"
        )


def _refuse_one_wrong_column(path: Path, kind: str, name: str, text: str, sep: str) -> None:
    """A single column whose name holds another delimiter: the file was split wrongly."""
    first = next((line for line in text.splitlines() if line.strip()), name)
    if first.lstrip().startswith('"'):
        return  # a quoted name may hold any character
    for delimiter, label in DELIMITERS.items():
        if delimiter != sep and delimiter in name:
            raise TableError(
                f"{path}: not a valid {kind} file: it reads as one column named {name!r}, which looks "
                f"{label}-separated ({delimiter!r}); check that every row has as many {label}s as the header"
            )


def _numbers_with_separators(frame: pd.DataFrame, decimal: str) -> list[str]:
    """Turn text columns of numbers written with thousands separators into
    numbers, in place; returns the names of the columns converted.

    A column converts only when every value is such a number or a plain
    number, and at least one has a separator: the thousands separator is
    "," when the decimal mark is "." and "." when it is ",".
    """
    thousands = "," if decimal == "." else "."
    t, d = re.escape(thousands), re.escape(decimal)
    grouped = rf"[+-]?\d{{1,3}}(?:{t}\d{{3}})+(?:{d}\d+)?"
    plain = rf"[+-]?(?:\d+(?:{d}\d*)?|{d}\d+)"
    number = f"(?:{grouped}|{plain})"
    converted = []
    for name in frame.columns:
        column = frame[name]
        if not (ptypes.is_string_dtype(column) or ptypes.is_object_dtype(column)):
            continue
        values = column.dropna()
        # a quick look at the first values spares a full scan of every text column
        if values.empty or not values.iloc[:1000].str.strip().str.fullmatch(number, na=False).all():
            continue
        values = values.str.strip()
        if not values.str.fullmatch(number, na=False).all() or not values.str.fullmatch(grouped, na=False).any():
            continue
        numbers = pd.to_numeric(values.str.replace(thousands, "", regex=False).str.replace(decimal, ".", regex=False))
        frame[name] = numbers.reindex(column.index)
        converted.append(name)
    return converted
