"""What every objective shares: the result of one trial, the error that says
an objective cannot be set up, and the small helpers every objective uses
(error text of an exception, the time-limit check, the clock).

A :class:`TrialResult` travels unchanged from the objective through the
search loop (:func:`warmstart.search.strategy.run_search`) to the archive
record: score, status, the objective's own cost, its error text and the
per-fold scores of a cross-validated objective.
"""

from __future__ import annotations

import math
import numbers
import time
from dataclasses import asdict, dataclass
from datetime import datetime, timezone
from typing import Any

from warmstart.errors import ObjectiveError

__all__ = ["ObjectiveError", "TrialResult", "error_text", "check_time_limit", "utc_now"]


def utc_now() -> datetime:
    """The current time in UTC (timezone-aware)."""
    return datetime.now(timezone.utc)


def error_text(exc: BaseException) -> str:
    """``"TypeName: message"`` of an exception (the type alone when it has no message)."""
    text = str(exc).strip()
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def check_time_limit(time_limit: Any) -> float | None:
    """A per-trial time limit in seconds as a float (None stays None).

    Raises
    ------
    ObjectiveError
        When the limit is not a positive number.
    """
    if time_limit is None:
        return None
    if isinstance(time_limit, bool) or not isinstance(time_limit, (int, float)) or not time_limit > 0:
        raise ObjectiveError(f"time_limit must be a positive number of seconds, got {time_limit!r}")
    return float(time_limit)


@dataclass(frozen=True)
class TrialResult:
    """The outcome of evaluating one config.

    Attributes
    ----------
    score : float or None
        The score in the metric's natural units (``None`` when failed).
    status : {"ok", "failed"}
        ``"failed"`` when no usable score came back.
    cost_s : float
        Wall-clock seconds the objective spent on the config.
    error : str or None
        What went wrong, for failed trials.
    started_at, finished_at : datetime or None
        UTC times the evaluation started and ended.
    fold_scores : tuple of float
        Per-fold scores of a cross-validated objective (empty otherwise).
    """

    score: float | None
    status: str
    cost_s: float
    error: str | None = None
    started_at: datetime | None = None
    finished_at: datetime | None = None
    fold_scores: tuple = ()

    @property
    def ok(self) -> bool:
        """True when the trial produced a usable score."""
        return self.status == "ok"

    def to_dict(self) -> dict:
        """Plain-data form (times as ISO strings)."""
        d = asdict(self)
        for key in ("started_at", "finished_at"):
            if d[key] is not None:
                d[key] = d[key].isoformat()
        d["fold_scores"] = list(self.fold_scores)
        return d

    @classmethod
    def failed(cls, error: str, started: float, started_at: datetime | None) -> "TrialResult":
        """A failed result whose cost runs from ``started`` (``time.perf_counter()``) to now."""
        return cls(None, "failed", time.perf_counter() - started, error, started_at, utc_now())

    @classmethod
    def from_value(cls, value: Any, started: float, started_at: datetime | None) -> "TrialResult":
        """The result of an objective that returned ``value`` (a TrialResult or a bare score).

        A TrialResult is kept as it is (a claimed ``ok`` without a finite
        score becomes failed, saying so); a finite number is an ok score
        whose cost runs from ``started`` to now; anything else (None, NaN,
        infinity, text) is a failed trial naming what came back.
        """
        if isinstance(value, TrialResult):
            if value.ok and not _is_finite_number(value.score):
                return cls(None, "failed", value.cost_s, f"objective reported status 'ok' with score {value.score!r}",
                           value.started_at, value.finished_at, value.fold_scores)
            return value
        if not _is_finite_number(value):
            kind = "" if value is None or isinstance(value, numbers.Real) else " (a score must be a number)"
            return cls.failed(f"objective returned {value!r}{kind}", started, started_at)
        return cls(float(value), "ok", time.perf_counter() - started, None, started_at, utc_now())


def _is_finite_number(value: Any) -> bool:
    """A real number (numpy's included, bool excluded) that is finite."""
    return isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(float(value))
