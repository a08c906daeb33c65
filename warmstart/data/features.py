"""Which columns a model and a profile see: identifier columns left out, dates written as text read as days."""
from __future__ import annotations

import re
import warnings
from typing import NamedTuple

import numpy as np
import pandas as pd
from pandas.api import types as ptypes
from pandas.tseries.api import guess_datetime_format

from warmstart.data.read import TableError, column_not_found

__all__ = ["EPOCH", "ID_WORDS", "TIME_WORDS", "FeatureFrame", "feature_frame", "suspect_columns"]


#: last words of a column name that say it identifies rows ("booking_id", "customerID", "order_no", "case")
ID_WORDS = frozenset({
    "id", "ids", "uuid", "guid", "key", "index", "idx", "no", "nr", "num", "number", "serial", "rownames",
    "rowname", "rownum", "rowid", "case", "obs", "subject", "patient", "participant", "respondent",
})
#: whole names too vague alone ("number" of survivors, "num" as a heart-disease grade)
_VAGUE_ALONE = frozenset({"number", "num"})
#: last words of a column name that say it counts time or steps: a column running 1, 2, 3 ... in row
#: order under such a name ("t", "day_of_year", "age") is a time index, a feature, not a row number
TIME_WORDS = frozenset({
    "t", "time", "date", "period", "step", "second", "seconds", "minute", "minutes", "hour", "hours", "day",
    "days", "week", "weeks", "month", "months", "quarter", "year", "years", "age",
})
#: whole names that identify rows ("Unnamed: 0" is how pandas reads an index column another tool wrote)
_ID_NAMES = re.compile(r"row|row[ _.]?names?|row[ _.]?numbers?|unnamed: ?\d+|\.\.\.\d+", re.IGNORECASE)
_WORDS = re.compile(r"[A-Z]+(?![a-z])|[A-Z]?[a-z]+|\d+")
_MONTH = r"(?:jan|feb|mar|apr|may|jun|jul|aug|sep|sept|oct|nov|dec)[a-z]*\.?"
_TIME = r"(?:[T ]\d{1,2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?\s*(?:Z|UTC|[+-]\d{2}:?\d{2})?)?"
#: text that a person would call a date, optionally with a time of day: 2024-03-05, 2024/3/5, 2024-03,
#: 05.03.2024, 3/5/24, 03/2024, 5 Mar 2024, 5-Mar-24, March 5, 2024, 2024 Mar, 2024 Q1, 2024 W09
_DATE_TEXT = re.compile(
    r"\s*(?:\d{4}([-/.])\d{1,2}\1\d{1,2}|\d{4}[-/]\d{1,2}|\d{1,2}([-/.])\d{1,2}\2(?:\d{4}|\d{2})|\d{1,2}[-/]\d{4}"
    rf"|\d{{1,2}}[- ]{_MONTH}[-, ]*(?:\d{{4}}|\d{{2}})|{_MONTH} \d{{1,2}},? \d{{4}}|\d{{4}} {_MONTH}"
    rf"|\d{{4}} ?-? ?[QW]\d{{1,2}}){_TIME}\s*",
    re.IGNORECASE,
)
_QUARTER = re.compile(r"^\s*(\d{4}) ?-? ?Q([1-4])\s*$", re.IGNORECASE)
_WEEK = re.compile(r"^\s*(\d{4}) ?-? ?W(\d{1,2})\s*$", re.IGNORECASE)
_DAY_MONTH = re.compile(r"^\s*(\d{1,2})[-/.](\d{1,2})[-/.]\d{2,4}")
_DATE_SAMPLE = 50  # values, spread over the column, that must all read as dates
#: days are counted from this instant (UTC); text without a time zone is read as UTC
EPOCH = pd.Timestamp("1970-01-01", tz="UTC")


class FeatureFrame(NamedTuple):
    """What :func:`feature_frame` returns: the feature table and what was done.

    Attributes
    ----------
    frame : pandas.DataFrame
        The table a profile or a learner should see (target included).
    notes : dict of str to str
        ``{column: what was done and why}`` for every column left out or
        converted; empty when the table was used as it is.
    """

    frame: pd.DataFrame
    notes: dict[str, str]


def _last_word(name: str) -> str:
    words = _WORDS.findall(str(name))
    return words[-1].lower() if words else ""


def _looks_like_id_name(name: str) -> bool:
    name = str(name).strip()
    if _ID_NAMES.fullmatch(name):
        return True
    if name.lower() in _VAGUE_ALONE:
        return False
    return _last_word(name) in ID_WORDS


def _is_text(col: pd.Series) -> bool:
    return not (ptypes.is_bool_dtype(col) or ptypes.is_numeric_dtype(col) or ptypes.is_datetime64_any_dtype(col)
                or ptypes.is_timedelta64_dtype(col))


def _spread_sample(values: pd.Series, size: int) -> pd.Series:
    """Up to ``size`` values spread evenly over the column (first and last included)."""
    if len(values) <= size:
        return values
    return values.iloc[np.unique(np.linspace(0, len(values) - 1, size).round().astype(np.int64))]


def _judge(name: str, col: pd.Series, min_rows: int) -> tuple[str, str] | None:
    """``("identifier" | "date", reason)`` for a column that is probably not a
    feature as it is written, else None."""
    values = col.dropna()
    n = len(values)
    if n < min_rows or ptypes.is_bool_dtype(values):
        return None
    if ptypes.is_numeric_dtype(values):
        if ptypes.is_complex_dtype(values):
            return None
        numbers = values.to_numpy(dtype=float)
        if not (np.all(np.isfinite(numbers)) and np.all(numbers == np.round(numbers))):
            return None  # fractions (or infinities) are measurements, never identifiers
        first = numbers[0]
        if n == len(col) and first in (0.0, 1.0) and _last_word(name) not in TIME_WORDS:
            if np.array_equal(numbers, first + np.arange(n)):
                return "identifier", f"a row number ({first:.0f}, {first + 1:.0f}, ... {numbers[-1]:.0f} in row order)"
        if _looks_like_id_name(name) and values.is_unique:
            return "identifier", "an identifier (a different whole number on every row, under an identifier's name)"
        return None
    if not _is_text(values):
        return None
    text = values.astype(str)
    sample = _spread_sample(text, _DATE_SAMPLE)
    if sample.str.fullmatch(_DATE_TEXT).all() and _to_days(sample)[0].notna().all():
        return "date", "dates written as text"
    if text.is_unique:
        return "identifier", "an identifier (text with a different value on every row)"
    return None


def _to_days(text: pd.Series) -> tuple[pd.Series, str]:
    """Days since 1970-01-01 (UTC) of date text, NaN where a value does not
    parse, and how day and month were ordered ("" when no value says).

    When values spread over the column are ISO 8601 the column is read as
    ISO 8601 first (one vectorised pass); the rest is read with the format
    guessed from its first value, then value by value. Day and month are
    ordered as the values show (a first number above 12 means day first),
    else month first. Two-digit years follow ``strptime``: 69-99 are 19xx,
    00-68 are 20xx.
    """
    text = text.astype(str).str.strip()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pandas warns when it falls back to parsing value by value
        sample = _spread_sample(text, _DATE_SAMPLE)
        if pd.to_datetime(sample, errors="coerce", format="ISO8601", utc=True).notna().any():
            parsed = pd.to_datetime(text, errors="coerce", format="ISO8601", utc=True)
            rest = parsed.isna()
            if not rest.any():
                return (parsed - EPOCH) / pd.Timedelta(days=1), ""
        else:
            parsed = pd.Series(pd.NaT, index=text.index, dtype="datetime64[ns, UTC]")
            rest = pd.Series(True, index=text.index)
        other = _calendar_periods(text[rest])
        # a spread sample tells the order of day and month (a regex over every value costs seconds per million)
        parts = _spread_sample(other, 10_000).str.extract(_DAY_MONTH).astype(float)
        dayfirst = bool((parts[0] > 12).any())
        order = ""
        if parts[0].notna().any():
            if dayfirst:
                order = "day first"
            elif (parts[1] > 12).any():
                order = "month first"
            else:
                order = "month first (no value had a day above 12, so day and month could be either way)"
        guessed = guess_datetime_format(other.iloc[0], dayfirst=dayfirst)
        more = pd.to_datetime(other, errors="coerce", format=guessed, utc=True) if guessed else None
        if more is None or more.isna().any():
            left = other if more is None else other[more.isna()]
            mixed = pd.to_datetime(left, errors="coerce", format="mixed", dayfirst=dayfirst, utc=True)
            more = mixed if more is None else more.fillna(mixed)
        parsed[rest] = more
    return (parsed - EPOCH) / pd.Timedelta(days=1), order


def _calendar_periods(text: pd.Series) -> pd.Series:
    """Quarters ("2024 Q2") and ISO weeks ("2024 W09") as the date they start on."""
    if not _spread_sample(text, _DATE_SAMPLE).str.contains(r"\d\s*-?\s*[QqWw]\d", regex=True).any():
        return text  # a full regex pass costs seconds per million values
    quarter, week = text.str.extract(_QUARTER), text.str.extract(_WEEK)
    if quarter[0].notna().any():  # the quarter's first day
        months = (quarter[1].astype(float) * 3 - 2).map("{:.0f}".format, na_action="ignore")
        text = text.mask(quarter[0].notna(), quarter[0] + "-" + months.str.zfill(2) + "-01")
    if week[0].notna().any():  # Monday of the ISO week
        monday = pd.to_datetime(week[0] + "-W" + week[1].str.zfill(2) + "-1", format="%G-W%V-%u", errors="coerce")
        text = text.mask(week[0].notna(), monday.dt.strftime("%Y-%m-%d"))
    return text


def suspect_columns(frame: pd.DataFrame, exclude=(), min_rows: int = 20) -> dict[str, str]:
    """Feature columns that are probably not features as written: row
    identifiers and dates stored as text.

    Parameters
    ----------
    frame : pandas.DataFrame
    exclude : iterable of str
        Columns not to look at (the target, columns to keep).
    min_rows : int, default 20
        Below this many non-missing values nothing is flagged (in a tiny table
        every column can look like an identifier).

    Returns
    -------
    dict
        ``{column: reason}``, the reason starting with "a row number",
        "an identifier" or "dates written as text". The rules:

        - a *row number*: whole numbers 0, 1, 2 ... or 1, 2, 3 ... in row
          order with none missing, unless the name's last word is a unit of
          time or order (:data:`TIME_WORDS`: ``t``, ``day_of_year``,
          ``age`` ...: a time index is a feature);
        - an *identifier*: text with a different value on every row, or
          whole numbers with a different value on every row (in any order)
          under an identifier's name: its last word is one of
          :data:`ID_WORDS` (``booking_id``, ``customerID``, ``order_no``,
          ``case``), or it is ``row``/``rownames``/``Unnamed: 0``;
        - *dates written as text*: text where each of 50 values spread over
          the column looks like a date (2024-03-05, 5/3/2024, 5 Mar 2024,
          2024 Q1 ..., optionally with a time) and parses as one.

        So whole numbers rising on every row are kept (a ``year`` column
        of a time series is a feature), and so is a shuffled 1..n under
        another name (ranks are features). Numbers with a fractional part,
        booleans and datetime columns are never flagged.

    Examples
    --------
    >>> frame = pd.DataFrame({"line": range(1, 31), "year": range(1951, 1981), "y": [0, 1] * 15})
    >>> suspect_columns(frame, exclude=["y"])
    {'line': 'a row number (1, 2, ... 30 in row order)'}
    """
    out: dict[str, str] = {}
    skip = set(exclude)
    for j, name in enumerate(frame.columns):
        if name in skip:
            continue
        verdict = _judge(str(name), frame.iloc[:, j], min_rows)
        if verdict is not None:
            out[str(name)] = verdict[1]
    return out


def feature_frame(frame: pd.DataFrame, target: str, keep=(), min_rows: int = 20) -> FeatureFrame:
    """The table a profile or a learner should see: identifier columns left
    out, dates written as text turned into numbers.

    Parameters
    ----------
    frame : pandas.DataFrame
        The table as read, target included.
    target : str
        Target column; it is never looked at or changed.
    keep : iterable of str, default ()
        Columns to leave exactly as they are, whatever they look like.
    min_rows : int, default 20
        Tables with fewer non-missing values in a column leave it alone
        (see :func:`suspect_columns`).

    Returns
    -------
    FeatureFrame
        ``(frame, notes)``. ``frame`` has the columns of the input in their
        order, without the identifier columns of :func:`suspect_columns`,
        and with each column of dates written as text replaced by a float
        column of days since 1970-01-01 (UTC; text without a time zone is
        read as UTC; NaN where a value does not parse). The input itself is
        returned when nothing changes, and is never modified. ``notes`` maps
        each column left out or converted to a sentence saying what was done
        and why.

    Raises
    ------
    TableError
        When ``target`` or a column named in ``keep`` is not in the table
        (the message suggests the close name).

    Examples
    --------
    >>> frame = pd.DataFrame({"booking_id": range(500, 530), "day": ["2024-03-05"] * 30,
    ...                       "nights": [1, 2, 3] * 10, "late": [0, 1] * 15})
    >>> table, notes = feature_frame(frame, target="late")
    >>> list(table.columns), float(table["day"].iloc[0])
    (['day', 'nights', 'late'], 19787.0)
    >>> print(notes["booking_id"])
    left out: looks like an identifier (a different whole number on every row, under an identifier's name)
    """
    labels = list(frame.columns)
    if target not in labels:
        raise TableError(column_not_found(target, labels))
    keep = [keep] if isinstance(keep, str) else list(keep)
    for name in keep:
        if name not in labels:
            raise TableError(column_not_found(name, labels, what="column to keep"))
    skip = {target, *keep}
    notes: dict[str, str] = {}
    drop: list[int] = []
    dates: dict[int, pd.Series] = {}
    for j, label in enumerate(labels):
        if label in skip:
            continue
        name = str(label)
        col = frame.iloc[:, j]
        verdict = _judge(name, col, min_rows)
        if verdict is None:
            continue
        what, why = verdict
        if what == "identifier":
            drop.append(j)
            notes[name] = f"left out: looks like {why}"
            continue
        dates[j], notes[name] = _as_days(col, why)
    if not notes:
        return FeatureFrame(frame, notes)
    out = frame.copy(deep=False)
    for j, days in dates.items():
        out.isetitem(j, days.astype(float))
    if drop:
        out = out.iloc[:, [j for j in range(len(labels)) if j not in set(drop)]]
    return FeatureFrame(out, notes)


def _as_days(col: pd.Series, why: str) -> tuple[pd.Series, str]:
    """A date column as days since 1970-01-01 (missing where a value did not parse), and its note."""
    present = col.notna()
    days, order = _to_days(col[present])
    failed = int(days.isna().sum())
    note = f"converted to days since 1970-01-01: {why}"
    if order:
        note += f", read {order}"
    if failed:
        note += f"; {failed} value(s) did not parse as dates and are missing"
    return days.reindex(col.index), note


