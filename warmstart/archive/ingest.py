"""Validation and preparation of past trials for the archive.

A table of trials has one column per parameter of the space plus ``score``,
and optionally ``status`` (``ok``/``failed``), ``cost_s``, ``started_at``,
``finished_at`` and ``error``. :func:`prepare_trials` checks every cell with
vectorised pandas operations and returns a frame ready for one bulk insert;
any problem raises :class:`~warmstart.errors.IngestError` naming the source,
the row (1-based, header not counted), the column and the value.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd

from warmstart.errors import IngestError
from warmstart.evaluate.metrics import METRICS, metric_bounds, metric_direction
from warmstart.space import Param, Space

__all__ = ["prepare_trials", "prepare_trial", "EXTRA_COLUMNS", "param_columns", "study_direction"]

EXTRA_COLUMNS = ("score", "status", "cost_s", "started_at", "finished_at", "error")
_STATUS = ("ok", "failed")

def _describe_range(low: float, high: float) -> str:
    if np.isinf(low):
        return f"at most {high:g}"
    if np.isinf(high):
        return f"at least {low:g}"
    return f"between {low:g} and {high:g}"


def study_direction(metric: str, minimize: bool | None) -> bool:
    """Whether a new study of ``metric`` maximises its score.

    A built-in metric (:data:`warmstart.evaluate.metrics.METRICS`) knows its direction; a
    flag that contradicts it is refused. A custom metric name follows the
    flag (default: higher is better).

    Parameters
    ----------
    metric : str
        Metric name.
    minimize : bool or None
        True for ``--minimize``, False for ``--maximize``, None when neither was given.

    Returns
    -------
    bool
        True when higher scores are better.

    Raises
    ------
    IngestError
        When ``minimize`` contradicts a built-in metric's direction.
    """
    if metric not in METRICS:
        return True if minimize is None else not minimize
    maximize = metric_direction(metric)
    if minimize is not None and minimize == maximize:
        natural, given = ("higher", "--minimize") if maximize else ("lower", "--maximize")
        raise IngestError(
            f"metric {metric!r} is built in and {natural} is better ({'maximize' if maximize else 'minimize'}); "
            f"{given} contradicts it: drop the flag, or name the metric differently if your scores are another quantity"
        )
    return maximize


def param_columns(space: Space) -> list[str]:
    """Names of the prepared value columns, one per parameter (``p0``, ``p1`` ...)."""
    return [f"p{j}" for j in range(space.dim)]


def _rows(mask: np.ndarray) -> np.ndarray:
    return np.flatnonzero(mask)


def _fail(where: str, row: int, column: str, value: Any, why: str) -> IngestError:
    if isinstance(value, np.generic):  # show 3.5, not np.float64(3.5)
        value = value.item()
    return IngestError(f"{where}: row {row + 1}, column {column!r}: value {value!r} {why}")


def _numeric(col: pd.Series, where: str, name: str, what: str) -> np.ndarray:
    raw = col.to_numpy(dtype=object, na_value=None) if not pd.api.types.is_numeric_dtype(col) else None
    if pd.api.types.is_bool_dtype(col):
        row = 0
        raise _fail(where, row, name, col.iloc[row], f"is a boolean; {what}")
    values = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    if raw is not None:
        given = np.array([v is not None and not (isinstance(v, str) and v.strip() == "") for v in raw])
        given &= ~pd.isna(col).to_numpy()
        bad = given & np.isnan(values)
        # "nan" text parses to NaN: that is a missing value, not a bad one.
        bad &= ~np.array([isinstance(v, str) and v.strip().lower() in ("nan", "na", "null", "none") for v in raw])
        if bad.any():
            row = int(_rows(bad)[0])
            raise _fail(where, row, name, raw[row], f"is not a number; {what}")
        bools = np.array([isinstance(v, (bool, np.bool_)) for v in raw])
        if bools.any():
            row = int(_rows(bools)[0])
            raise _fail(where, row, name, raw[row], f"is a boolean; {what}")
    return values


def _match_level(p: Param, v: Any) -> int:
    """Index of the level a cell holds, or -1. Text is also read as JSON or a
    boolean ("2", "true"); a number also matches a text level that spells it
    (a CSV reader turns the level "10" into the number 10)."""
    k = p.level_index(v)
    if k >= 0:
        return k
    if isinstance(v, str):
        for parsed in _parse_text(v.strip()):
            k = p.level_index(parsed)
            if k >= 0:
                return k
    elif isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_)):
        spellings = [str(v.item() if isinstance(v, np.generic) else v)]
        if float(v).is_integer():
            spellings.append(str(int(v)))
        for text in spellings:
            k = p.level_index(text)
            if k >= 0:
                return k
    return -1


def _choice_indices(p: Param, col: pd.Series, where: str) -> np.ndarray:
    """Level index per row (-1 where missing)."""
    if pd.api.types.is_object_dtype(col):
        # Mixed Python values (JSON lines): True == 1 for hashing, so match value by value.
        idx = np.full(len(col), -1, dtype=np.int64)
        values = col.to_numpy(dtype=object, na_value=None)
        lookup: dict[Any, int] = {}
        for i in _rows(~pd.isna(col).to_numpy()):
            v = values[i]
            key = (type(v).__name__, v)
            if key not in lookup:
                k = _match_level(p, v)
                if k < 0:
                    raise _fail(where, int(i), p.name, v, f"is not allowed; {p.describe()}")
                lookup[key] = k
            idx[i] = lookup[key]
        return idx
    # One dtype for the whole column: match each distinct value once.
    codes, uniques = pd.factorize(col, use_na_sentinel=True)
    levels = np.array([_match_level(p, v) for v in uniques], dtype=np.int64)
    idx = np.where(codes >= 0, levels[np.maximum(codes, 0)] if len(levels) else -1, -1)
    bad = (codes >= 0) & (idx < 0)
    if bad.any():
        row = int(_rows(bad)[0])
        raise _fail(where, row, p.name, col.iloc[row], f"is not allowed; {p.describe()}")
    return idx


def _parse_text(text: str) -> list:
    out: list = [text]
    try:
        out.append(json.loads(text))
    except ValueError:
        pass
    if text.lower() in ("true", "false"):
        out.append(text.lower() == "true")
    return out


def prepare_trials(space: Space, frame: pd.DataFrame, where: str = "trials", metric: str | None = None) -> pd.DataFrame:
    """Validate a table of trials against a space and prepare it for insert.

    Parameters
    ----------
    space : Space
        The study's search space.
    frame : pandas.DataFrame
        One column per parameter plus ``score``; optional ``status``,
        ``cost_s``, ``started_at``, ``finished_at``, ``error``. A value in the
        column of an inactive conditional parameter is ignored; a missing
        value of an active parameter is an error.
    where : str
        Name of the source used in error messages (a file name).
    metric : str, optional
        The study's metric: successful scores of a built-in metric must lie
        in its range (:func:`metric_bounds`); None or a custom name checks
        nothing.

    Returns
    -------
    pandas.DataFrame
        Columns ``p0 .. p{d-1}`` (float for real, Int64 for integer, a
        categorical of the levels' JSON texts for choice; missing where
        inactive), ``score`` (NaN for failed trials), ``status`` (categorical
        ``ok``/``failed``), ``cost_s``, ``started_at``, ``finished_at``,
        ``error``.

    Raises
    ------
    IngestError
        Unknown or missing columns, values outside the space, wrong types,
        bad statuses or times, scores outside a built-in metric's range,
        or an empty table.
    """
    frame, columns = _checked_columns(space, frame, where)
    codes, present, numeric = _parameter_cells(space, frame, columns, where)
    active = space.active_mask(codes)
    _check_active_given(space, frame, columns, active, present, where)
    out = _parameter_columns(space, frame, codes, numeric, active, where)
    score, failed = _scores(frame, columns, where, metric)
    out["score"] = np.where(failed, np.nan, score)
    out["status"] = pd.Categorical.from_codes(failed.astype(np.int8), categories=list(_STATUS))
    out.update(_costs_and_times(frame, columns, where))
    out["error"] = _error_texts(frame, columns, np.isfinite(score))
    return pd.DataFrame(out)


def _checked_columns(space: Space, frame: Any, where: str) -> tuple[pd.DataFrame, list[str]]:
    """The table with text column names and a fresh index; refuses no rows, repeated,
    unknown or missing columns."""
    if not isinstance(frame, pd.DataFrame):
        raise IngestError(f"{where}: expected a table (DataFrame), got {type(frame).__name__}")
    if len(frame) == 0:
        raise IngestError(f"{where}: the table has no rows")
    columns = [str(c) for c in frame.columns]
    frame = frame.set_axis(columns, axis=1).reset_index(drop=True)
    dup = sorted({c for c in columns if columns.count(c) > 1})
    if dup:
        raise IngestError(f"{where}: column(s) {dup} appear more than once")
    unknown = [c for c in columns if c not in space and c not in EXTRA_COLUMNS]
    if unknown:
        raise IngestError(
            f"{where}: unknown column(s) {unknown}; expected the space's parameters {space.names} "
            f"plus 'score' and optionally {list(EXTRA_COLUMNS[1:])}"
        )
    if "score" not in columns:
        raise IngestError(f"{where}: no 'score' column; columns are {columns}")
    missing_cols = [p.name for p in space.params if p.name not in columns and not p.when]
    if missing_cols:
        raise IngestError(
            f"{where}: missing column(s) for parameter(s) {missing_cols}; every unconditional "
            f"parameter of the space ({space.names}) needs a column"
        )
    return frame, columns


def _parameter_cells(space: Space, frame: pd.DataFrame, columns: list[str],
                     where: str) -> tuple[np.ndarray, np.ndarray, dict[int, np.ndarray]]:
    """Per cell: the level index of a choice (what conditions test; 0 for a given
    number), whether a value is given, and the numbers of real/integer columns."""
    n = len(frame)
    codes = np.full((n, space.dim), np.nan)
    present = np.zeros((n, space.dim), dtype=bool)
    numeric: dict[int, np.ndarray] = {}
    for j, p in enumerate(space.params):
        if p.name not in columns:
            continue
        col = frame[p.name]
        if p.kind == "choice":
            idx = _choice_indices(p, col, where)
            present[:, j] = idx >= 0
            codes[present[:, j], j] = idx[present[:, j]]
        else:
            vals = _numeric(col, where, p.name, p.describe())
            present[:, j] = ~np.isnan(vals)
            numeric[j] = vals
            codes[present[:, j], j] = 0.0
    return codes, present, numeric


def _check_active_given(space: Space, frame: pd.DataFrame, columns: list[str], active: np.ndarray,
                        present: np.ndarray, where: str) -> None:
    """Refuse a row where an active parameter has no value."""
    for j, p in enumerate(space.params):
        lacking = active[:, j] & ~present[:, j]
        if lacking.any():
            row = int(_rows(lacking)[0])
            if p.name not in columns:
                raise IngestError(f"{where}: row {row + 1}: parameter {p.name!r} is active but there is no column for it")
            raw = frame[p.name].iloc[row]
            raise _fail(where, row, p.name, raw, f"is missing or not finite, but parameter {p.name!r} is active here; {p.describe()}")


def _parameter_columns(space: Space, frame: pd.DataFrame, codes: np.ndarray, numeric: dict[int, np.ndarray],
                       active: np.ndarray, where: str) -> dict[str, Any]:
    """The prepared value columns ``p0 ..``: range and whole-number checks; missing where inactive."""
    n = len(frame)
    out: dict[str, Any] = {}
    for j, (p, name) in enumerate(zip(space.params, param_columns(space))):
        use = active[:, j]
        if p.kind == "choice":
            # categorical of the levels' JSON texts: small integer codes, cheap to build and to scan
            level_codes = np.where(use, np.nan_to_num(codes[:, j], nan=-1.0), -1).astype(np.int64)
            out[name] = pd.Categorical.from_codes(level_codes, categories=[json.dumps(level) for level in p.choices])
            continue
        vals = numeric.get(j, np.full(n, np.nan))  # a conditional column may be absent when never active
        bad_inf = use & np.isinf(vals)
        if bad_inf.any():
            row = int(_rows(bad_inf)[0])
            raise _fail(where, row, p.name, frame[p.name].iloc[row], f"is not finite; {p.describe()}")
        outside = use & ((vals < p.low) | (vals > p.high))
        if outside.any():
            row = int(_rows(outside)[0])
            raise _fail(where, row, p.name, frame[p.name].iloc[row], f"is out of range; {p.describe()}")
        if p.kind == "integer":
            frac = use & (vals != np.round(vals))
            if frac.any():
                row = int(_rows(frac)[0])
                raise _fail(where, row, p.name, frame[p.name].iloc[row], f"is not a whole number; {p.describe()}")
            out[name] = pd.arrays.IntegerArray(np.where(use, vals, 0).astype(np.int64), ~use)
        else:
            out[name] = np.where(use, vals, np.nan)
    return out


def _scores(frame: pd.DataFrame, columns: list[str], where: str, metric: str | None) -> tuple[np.ndarray, np.ndarray]:
    """Scores as numbers and which trials failed (status ``failed``, or no finite score);
    a successful score outside a built-in metric's range is refused."""
    score = _numeric(frame["score"], where, "score", "a score must be a number (empty, NaN or inf mark a failed trial)")
    finite = np.isfinite(score)
    if "status" in columns:
        status_raw = frame["status"]
        status = status_raw.astype("string").str.strip().str.lower()
        status = status.fillna("ok")
        bad = ~status.isin(_STATUS).to_numpy()
        if bad.any():
            row = int(_rows(bad)[0])
            raise _fail(where, row, "status", status_raw.iloc[row], f"is not a status; use one of {list(_STATUS)}")
        failed = (status == "failed").to_numpy() | ~finite
    else:
        failed = ~finite
    bounds = metric_bounds(metric)
    if bounds is not None:
        outside = ~failed & ((score < bounds[0]) | (score > bounds[1]))
        if outside.any():
            row = int(_rows(outside)[0])
            raise _fail(where, row, "score", frame["score"].iloc[row],
                        f"is impossible for metric {metric!r}: its scores are {_describe_range(*bounds)} "
                        "(scikit-learn's metric definitions)")
    return score, failed


def _costs_and_times(frame: pd.DataFrame, columns: list[str], where: str) -> dict[str, Any]:
    """``cost_s`` (seconds >= 0) and ``started_at``/``finished_at`` (UTC, naive); missing when not given."""
    n = len(frame)
    out: dict[str, Any] = {}
    if "cost_s" in columns:
        cost = _numeric(frame["cost_s"], where, "cost_s", "cost_s is the trial's cost in seconds (a number >= 0)")
        bad = ~np.isnan(cost) & ((cost < 0) | np.isinf(cost))
        if bad.any():
            row = int(_rows(bad)[0])
            raise _fail(where, row, "cost_s", frame["cost_s"].iloc[row], "is not a cost in seconds (a finite number >= 0)")
        out["cost_s"] = cost
    else:
        out["cost_s"] = np.full(n, np.nan)
    for name in ("started_at", "finished_at"):
        if name in columns:
            raw = frame[name]
            stamps = pd.to_datetime(raw, errors="coerce", utc=True, format="mixed")
            bad = (stamps.isna() & raw.notna()).to_numpy()
            if bad.any():
                row = int(_rows(bad)[0])
                raise _fail(where, row, name, raw.iloc[row], "is not a date-time (use ISO 8601, e.g. 2026-03-01T12:00:00)")
            out[name] = stamps.dt.tz_convert(None).astype("datetime64[us]")
        else:
            out[name] = pd.Series(pd.NaT, index=range(n), dtype="datetime64[us]")
    return out


def _error_texts(frame: pd.DataFrame, columns: list[str], finite: np.ndarray) -> np.ndarray:
    """The error text of each trial; a trial without a finite score says so when it has none."""
    if "error" in columns:
        given = frame["error"]
        errors = given.astype("string").astype(object).to_numpy().copy()
        errors[pd.isna(given).to_numpy()] = None
    else:
        errors = np.full(len(frame), None, dtype=object)
    errors[~finite & pd.isna(errors)] = "score is missing or not finite"
    return errors


def prepare_trial(space: Space, config: Any, score: Any, status: Any = "ok", cost_s: Any = None,
                  started_at: Any = None, finished_at: Any = None, error: Any = None, where: str = "trial",
                  metric: str | None = None) -> dict[str, Any]:
    """Validate one trial as :func:`prepare_trials` validates a row, for a one-row insert.

    The same rules and messages as a one-row table, without building one:
    ``config`` must be a valid config of ``space`` (exactly its active
    parameters); a score that is None, NaN or infinite, or status
    ``failed``, makes a failed trial (score None); a successful score of a
    built-in metric must lie in its range; ``cost_s`` is None or a finite
    number >= 0; times are date-times (naive ones are taken as UTC).

    Returns
    -------
    dict
        ``values``: one entry per parameter in space order (the canonical
        value; a choice as its level's JSON text, as the batch insert writes
        it; None where inactive), then ``score`` (float or None), ``status``,
        ``cost_s``, ``started_at``, ``finished_at`` (naive UTC datetimes or
        None) and ``error``.

    Raises
    ------
    SpaceError
        The config is not a config of the space.
    IngestError
        A bad score, status, cost or time.
    """
    config = space.normalize(config)
    values: list[Any] = []
    for p in space.params:
        value = config.get(p.name)
        values.append(json.dumps(value) if p.kind == "choice" and p.name in config else value)
    value = _one_number(score, where, "score", "a score must be a number (empty, NaN or inf mark a failed trial)")
    finite = value is not None and np.isfinite(value)
    text = "ok" if status is None else str(status).strip().lower()
    if text not in _STATUS:
        raise _fail(where, 0, "status", status, f"is not a status; use one of {list(_STATUS)}")
    failed = text == "failed" or not finite
    bounds = metric_bounds(metric)
    if bounds is not None and not failed and not bounds[0] <= value <= bounds[1]:
        raise _fail(where, 0, "score", score, f"is impossible for metric {metric!r}: its scores are "
                    f"{_describe_range(*bounds)} (scikit-learn's metric definitions)")
    cost = _one_number(cost_s, where, "cost_s", "cost_s is the trial's cost in seconds (a number >= 0)")
    if cost is not None and (cost < 0 or np.isinf(cost)):
        raise _fail(where, 0, "cost_s", cost_s, "is not a cost in seconds (a finite number >= 0)")
    if cost is not None and np.isnan(cost):
        cost = None
    if error is not None and not pd.isna(error):
        error = str(error)
    else:
        error = None if finite else "score is missing or not finite"
    return {"values": values, "score": None if failed else float(value), "status": "failed" if failed else "ok",
            "cost_s": cost, "started_at": _one_moment(started_at, where, "started_at"),
            "finished_at": _one_moment(finished_at, where, "finished_at"), "error": error}


def _one_number(value: Any, where: str, name: str, what: str) -> float | None:
    """A cell as a float (None when missing), refused as :func:`_numeric` refuses it."""
    if value is None or (isinstance(value, str) and value.strip() == ""):
        return None
    if isinstance(value, (bool, np.bool_)):
        raise _fail(where, 0, name, value, f"is a boolean; {what}")
    if isinstance(value, str) and value.strip().lower() in ("nan", "na", "null", "none"):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise _fail(where, 0, name, value, f"is not a number; {what}") from None
    return number


def _one_moment(value: Any, where: str, name: str):
    """A time as a naive UTC datetime with microseconds (as the batch insert stores it), or None."""
    if value is None:
        return None
    stamp = pd.to_datetime(value, errors="coerce", utc=True)
    if pd.isna(stamp):
        if pd.isna(value):
            return None
        raise _fail(where, 0, name, value, "is not a date-time (use ISO 8601, e.g. 2026-03-01T12:00:00)")
    return stamp.tz_convert(None).to_pydatetime(warn=False)
