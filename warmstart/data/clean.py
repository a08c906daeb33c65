"""The table a profile and a learner see, and a sentence for everything done to make it.

:func:`clean_table` is the one place that decides which rows, labels, values
and columns of a task's table a profile (:func:`warmstart.profile.profile`)
and the cross-validated objective (:func:`warmstart.evaluate.learners.cv_objective`)
use, so both always see the same table. It applies, in order:

1. :func:`warmstart.data.features.feature_frame` on the table as given:
   identifier columns left out, dates written as text read as days;
2. rows whose target is missing (or, for a numeric target, infinite) left out;
3. text target labels that differ only in case or surrounding spaces merged;
4. infinite values of feature columns read as missing;
5. feature columns with no value, or with one value in every row, named
   (kept: a model learns nothing from them, and leaving them out would
   change the profiles already stored in archives).

Each step that changes or finds something adds a plain sentence to the
result's notes; a command prints them as ``note:`` lines (or refuses the file
under ``--strict``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from warmstart.data.features import feature_frame
from warmstart.data.read import TableError

__all__ = ["CleanTable", "clean_table"]


@dataclass(frozen=True)
class CleanTable:
    """What :func:`clean_table` returns.

    Attributes
    ----------
    frame : pandas.DataFrame
        The table a profile or a learner should see, target included.
    column_notes : dict of str to str
        ``{column: what was done and why}`` for each column left out as an
        identifier or converted from dates written as text (what
        ``keep_columns`` undoes); from :func:`~warmstart.data.features.feature_frame`.
    notes : tuple of str
        One sentence per other finding: rows left out, labels merged,
        values read as missing, columns a model learns nothing from.
    """

    frame: pd.DataFrame
    column_notes: dict[str, str] = field(default_factory=dict)
    notes: tuple[str, ...] = ()


def clean_table(frame: pd.DataFrame, target: str, keep_columns=(), min_rows: int = 20) -> CleanTable:
    """The rows, labels, values and columns of a task that a profile and a learner use.

    Parameters
    ----------
    frame : pandas.DataFrame
        The table as read, target included. It is never modified.
    target : str
        Target column.
    keep_columns : iterable of str, default ()
        Columns never left out or converted as identifiers or dates (see
        :func:`~warmstart.data.features.feature_frame`); their infinite
        values still become missing.
    min_rows : int, default 20
        Passed on to :func:`~warmstart.data.features.feature_frame`.

    Returns
    -------
    CleanTable
        The table and the notes. What is done:

        - rows whose target is missing are left out, and so are rows whose
          numeric target is infinite; a note gives the count and the share;
        - when the target holds text, labels that are equal once surrounding
          spaces are removed and case is ignored (``"yes"``, ``"Yes "``)
          become one label: the most frequent spelling without surrounding
          spaces (or the most frequent, when every spelling has them; ties
          go to the spelling met first). A note lists each spelling with its
          row count. Numeric and boolean targets are never changed;
        - infinite values in float feature columns become missing, counted
          per column;
        - feature columns with no value in any remaining row, or the same
          value in every remaining row, are named in a note and kept.

        Row labels (the index) are those of ``frame``; the input itself is
        returned when nothing changes.

    Raises
    ------
    TableError
        When the target or a column to keep is not in the table, the target
        column appears more than once, or no row has a target value.

    Examples
    --------
    >>> frame = pd.DataFrame({"nights": [1.0, 2.0, float("inf"), 4.0, 5.0],
    ...                       "late": ["yes", "Yes ", "no", None, "no"]})
    >>> table = clean_table(frame, target="late")
    >>> table.frame["late"].tolist(), table.frame["nights"].tolist()
    (['yes', 'yes', 'no', 'no'], [1.0, 2.0, nan, 5.0])
    >>> for note in table.notes:
    ...     print(note)
    1 of 5 rows (20.0 %) have no value in the target column 'late': left out
    target 'late': labels that differ only in case or surrounding spaces were merged: 'yes' (1 row) and 'Yes ' (1 row) as 'yes'
    column 'nights': 1 infinite value(s) read as missing
    """
    hits = [j for j, name in enumerate(frame.columns) if name == target]
    if len(hits) > 1:
        raise TableError(f"target column {target!r} appears {len(hits)} times; give every column its own name")
    table, column_notes = feature_frame(frame, target, keep=keep_columns, min_rows=min_rows)
    notes: list[str] = []
    table = _rows_with_target(table, target, notes)
    changed: dict[int, pd.Series] = {}
    position = list(table.columns).index(target)
    labels = _merged_labels(table.iloc[:, position], target, notes)
    if labels is not None:
        changed[position] = labels
    for j, name in enumerate(table.columns):
        if j == position:
            continue
        column = _finite(table.iloc[:, j], str(name), notes)
        if column is not None:
            changed[j] = column
        _say_if_uninformative(changed.get(j, table.iloc[:, j]), str(name), notes)
    if changed:
        table = table.copy(deep=False)
        for j, column in changed.items():
            table.isetitem(j, column)
    return CleanTable(table, column_notes, tuple(notes))


def _rows_with_target(table: pd.DataFrame, target: str, notes: list[str]) -> pd.DataFrame:
    """The rows with a target value; a note for each kind of row left out."""
    y = table[target]
    n = len(y)
    missing = y.isna().to_numpy()
    infinite = np.zeros(n, dtype=bool)
    if ptypes.is_float_dtype(y):
        infinite = np.isinf(y.to_numpy(dtype=float, na_value=np.nan))
    drop = missing | infinite
    if n and drop.all():
        what = "missing" if not infinite.any() else "missing or infinite"
        raise TableError(f"target column {target!r} is {what} in all {n} rows; nothing to learn from")
    if missing.any():
        k = int(missing.sum())
        notes.append(f"{k} of {n} rows ({100 * k / n:.1f} %) have no value in the target column {target!r}: left out")
    if infinite.any():
        k = int(infinite.sum())
        notes.append(f"{k} of {n} rows ({100 * k / n:.1f} %) have an infinite value in the target column "
                     f"{target!r}: left out")
    return table.iloc[np.flatnonzero(~drop)] if drop.any() else table


def _merged_labels(y: pd.Series, target: str, notes: list[str]) -> pd.Series | None:
    """Text labels that differ only in case or surrounding spaces as one
    spelling, or None when the target is not text or nothing is merged."""
    if ptypes.is_bool_dtype(y) or ptypes.is_numeric_dtype(y) or ptypes.is_datetime64_any_dtype(y) \
            or ptypes.is_timedelta64_dtype(y):
        return None
    present = y.notna().to_numpy()
    text = y[present].astype(str)
    counts = text.value_counts(sort=False)  # spelling -> rows, in order of first appearance
    if counts.empty:
        return None
    keys = counts.index.str.strip().str.casefold()
    if keys.nunique() == len(counts):
        return None
    mapping: dict[str, str] = {}
    merged: list[str] = []
    for key in pd.unique(keys):
        spellings = counts[keys == key]
        if len(spellings) < 2:
            continue
        # the most frequent spelling without surrounding spaces; ties to the one met first
        trimmed = [s.strip() == s for s in spellings.index]
        order = sorted(range(len(spellings)), key=lambda i: (not trimmed[i], -spellings.iloc[i], i))
        chosen = spellings.index[order[0]]
        listed = [spellings.index[i] for i in order]
        mapping.update({s: chosen for s in listed if s != chosen})
        parts = [f"{s!r} ({spellings[s]} row{'s' if spellings[s] != 1 else ''})" for s in listed]
        merged.append(f"{' and '.join([', '.join(parts[:-1]), parts[-1]])} as {chosen!r}")
    notes.append(f"target {target!r}: labels that differ only in case or surrounding spaces were merged: "
                 + "; ".join(merged))
    rows = np.flatnonzero(present)[text.isin(list(mapping)).to_numpy()]
    out = y.astype(object) if isinstance(y.dtype, pd.CategoricalDtype) else y.copy()
    out.iloc[rows] = text.iloc[np.flatnonzero(text.isin(list(mapping)).to_numpy())].map(mapping).to_numpy()
    return out


def _finite(column: pd.Series, name: str, notes: list[str]) -> pd.Series | None:
    """The float column with infinite values as missing, or None when it has none."""
    if not ptypes.is_float_dtype(column):
        return None
    infinite = np.isinf(column.to_numpy(dtype=float, na_value=np.nan))
    if not infinite.any():
        return None
    notes.append(f"column {name!r}: {int(infinite.sum())} infinite value(s) read as missing")
    return column.mask(infinite)


def _say_if_uninformative(column: pd.Series, name: str, notes: list[str]) -> None:
    """A note for a column with no value, or one value in every row."""
    n = len(column)
    present = column.notna().to_numpy()
    if n and not present.any():
        notes.append(f"column {name!r} has no value in any of the {n} rows: "
                     "kept, though a model learns nothing from it")
        return
    if n < 2 or not present.all():
        return
    if ptypes.is_numeric_dtype(column) and not ptypes.is_bool_dtype(column) and not ptypes.is_complex_dtype(column):
        values = column.to_numpy(dtype=float)
        same = bool(np.all(values == values[0]))
    else:
        same = bool((column == column.iloc[0]).all())
    if same:
        first = column.iloc[0]
        first = first.item() if isinstance(first, np.generic) else first
        notes.append(f"column {name!r} holds the same value ({first!r}) in all {n} rows: "
                     "kept, though a model learns nothing from it")
