"""What every search strategy shares: results bookkeeping and one search loop.

A strategy proposes configs (:meth:`SearchStrategy.propose`) and is told
their results (:meth:`SearchStrategy.record`); subclasses only say how the
next config is chosen (``_propose_one``). :func:`run_search` evaluates an
objective with any strategy, records every trial (an exception in the
objective becomes a failed trial and the loop goes on) and returns a
:class:`SearchResult`. An objective's
:class:`~warmstart.evaluate.result.TrialResult` reaches the :class:`Trial`
whole: score, status, the objective's own cost, its error text and its
per-fold scores.
"""

from __future__ import annotations

import concurrent.futures as cf
import dataclasses
import json
import math
import time
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Callable, Mapping

import numpy as np
import pandas as pd

from warmstart._checks import check_count
from warmstart.errors import WarmstartError
from warmstart.evaluate.result import TrialResult, error_text, utc_now
from warmstart.evaluate.workers import wait_first
from warmstart.space import Space

__all__ = ["SearchError", "Trial", "SearchStrategy", "SearchResult", "run_search"]

STATUSES = ("ok", "failed")


class SearchError(WarmstartError, ValueError):
    """A search was set up or driven with invalid arguments."""


@dataclass(frozen=True)
class Trial:
    """One evaluated config.

    Attributes
    ----------
    number : int
        Position in the search, from 0.
    config : dict
        The config (canonical values, space order).
    score : float or None
        The score; ``None`` for a failed trial.
    status : {"ok", "failed"}
        Outcome.
    source : str
        Where the config came from: ``"seed"`` (the prior's seeds),
        ``"design"`` (space-filling start), ``"model"``, ``"random"``,
        ``"simplex"``, ... or ``"external"`` (recorded without a proposal).
    cost_s : float, optional
        Seconds the evaluation took: the objective's own figure when it
        returns a :class:`~warmstart.evaluate.result.TrialResult`, else the
        wall time of the call (set by :func:`run_search`).
    started_at, finished_at : datetime, optional
        UTC times the evaluation started and ended.
    error : str, optional
        Error text of a failed evaluation, as the objective gave it.
    fold_scores : tuple of float
        Per-fold scores of a cross-validated objective (empty otherwise).
    """

    number: int
    config: dict
    score: float | None
    status: str
    source: str = "external"
    cost_s: float | None = None
    started_at: datetime | None = None
    finished_at: datetime | None = None
    error: str | None = None
    fold_scores: tuple = ()


def _row_key(row: np.ndarray) -> bytes:
    """Hashable key of an encoded row (inactive coordinates as -1)."""
    return _key_rows(row).tobytes()


def _key_rows(X: np.ndarray) -> np.ndarray:
    """Encoded rows as their keys are made of: inactive coordinates as -1, rounded to 9 places."""
    return np.round(np.where(np.isnan(X), -1.0, X), 9)


def _config_key(config: Mapping) -> str:
    """Canonical JSON of a normalised config (as Space.canonical_json, unvalidated)."""
    return json.dumps(config, sort_keys=True, separators=(",", ":"))


def classify_result(score: Any, status: str | None) -> tuple[float | None, str]:
    """Return ``(score, status)`` of a result as recorded.

    ``None``, NaN and infinite scores are failures; ``status="failed"``
    drops any score.
    """
    if status is not None and status not in STATUSES:
        raise SearchError(f"status must be one of {', '.join(STATUSES)}, got {status!r}")
    if status == "failed" or score is None:
        return None, "failed"
    if isinstance(score, (bool, np.bool_)) or not isinstance(score, (int, float, np.number)):
        raise SearchError(f"score must be a number (or None for a failed trial), got {score!r}")
    value = float(score)
    if not math.isfinite(value):
        if status == "ok":
            raise SearchError(f"status 'ok' needs a finite score, got {score!r}; "
                              "record it with status='failed' instead")
        return None, "failed"
    return value, "ok"


class SearchStrategy:
    """Base of every search strategy: proposals, results and history.

    Parameters
    ----------
    space : Space
        The search space.
    seed : int or numpy Generator, default 0
        Source of randomness (``numpy.random.default_rng(seed)``).
    maximize : bool, default True
        Whether larger scores are better.
    """

    def __init__(self, space: Space, seed: Any = 0, maximize: bool = True):
        if not isinstance(space, Space):
            raise SearchError(f"space must be a warmstart Space, got {type(space).__name__}")
        if not isinstance(maximize, (bool, np.bool_)):
            raise SearchError(f"maximize must be True or False, got {maximize!r}")
        self.space = space
        self.maximize = bool(maximize)
        self.seed = seed
        self._rng = np.random.default_rng(seed)
        self._trials: list[Trial] = []
        self._rows = np.empty((16, space.dim))
        self._signed = np.empty(16)
        self._known: set[bytes] = set()
        # canonical JSON -> [config, source, encoded row, count, row key]
        self._pending: dict[str, list] = {}

    # -- hooks -------------------------------------------------------------
    def _propose_one(self) -> tuple[dict, str]:  # pragma: no cover - abstract
        """Return the next config and where it came from."""
        raise NotImplementedError

    def _observe(self) -> None:
        """Called after each recorded result (subclasses update their state)."""

    # -- public API ----------------------------------------------------------
    def propose(self, k: int | None = None) -> dict | list[dict]:
        """Propose the next config, or a list of ``k`` configs for parallel workers.

        Proposed configs stay *pending* until recorded; strategies that model
        the scores treat pending configs as already tried, so a batch spreads.

        Parameters
        ----------
        k : int, optional
            Number of configs; ``None`` returns a single dict.
        """
        if k is None:
            return self._propose_and_hold()
        k = check_count("k", k, minimum=1, error=SearchError)
        return [self._propose_and_hold() for _ in range(k)]

    def _propose_and_hold(self) -> dict:
        config, source = self._propose_one()
        return self._hold_normalized(config, source)

    def _hold_normalized(self, config: dict, source: str) -> dict:
        key = _config_key(config)
        if key in self._pending:
            self._pending[key][3] += 1
        else:
            row = self.space.encode([config])[0]
            self._pending[key] = [config, source, row, 1, _row_key(row)]
        return dict(config)

    def record(self, config: Mapping, score: Any = None, status: str | None = None) -> Trial:
        """Record the result of a config.

        Parameters
        ----------
        config : mapping
            A valid config of the space (proposed or not).
        score : float or None
            The score. ``None``, NaN or infinite mark a failed trial, which
            is never scored as a number.
        status : {"ok", "failed"}, optional
            ``"failed"`` marks a failure whatever the score.

        Returns
        -------
        Trial

        Raises
        ------
        SpaceError
            The config is not valid in the space.
        SearchError
            The score or status is not valid.
        """
        config = self.space.normalize(config)
        value, status = classify_result(score, status)
        key = _config_key(config)
        source = "external"
        entry = self._pending.get(key)
        if entry is not None:  # its row was encoded when it was held (the same config: the same row)
            source, row, row_key = entry[1], entry[2], entry[4]
            entry[3] -= 1
            if entry[3] == 0:
                del self._pending[key]
        else:
            row = self.space.encode([config])[0]
            row_key = _row_key(row)
        n = len(self._trials)
        if n == self._rows.shape[0]:
            self._rows = np.vstack([self._rows, np.empty_like(self._rows)])
            self._signed = np.concatenate([self._signed, np.empty_like(self._signed)])
        self._rows[n] = row
        self._signed[n] = np.nan if value is None else (value if self.maximize else -value)
        self._known.add(row_key)
        trial = Trial(number=n, config=config, score=value, status=status, source=source)
        self._trials.append(trial)
        self._observe()
        return trial

    def hold(self, config: Mapping, source: str = "external") -> dict:
        """Mark a config as pending, as if this search had proposed it.

        A search rebuilt from stored history uses it for configs proposed
        earlier and not recorded yet (the leases of the team service), so new
        proposals stay apart from them. Returns the normalised config.
        """
        return self._hold_normalized(self.space.normalize(config), source)

    def release(self, config: Mapping) -> bool:
        """Forget one pending copy of a config that will not be recorded
        (e.g. an expired lease); False when it was not pending."""
        key = _config_key(self.space.normalize(config))
        entry = self._pending.get(key)
        if entry is None:
            return False
        entry[3] -= 1
        if entry[3] == 0:
            del self._pending[key]
        return True

    # -- state -------------------------------------------------------------
    @property
    def trial_count(self) -> int:
        """Number of recorded trials (ok and failed)."""
        return len(self._trials)

    @property
    def n_pending(self) -> int:
        """Number of proposed configs not yet recorded."""
        return sum(entry[3] for entry in self._pending.values())

    @property
    def trials(self) -> tuple[Trial, ...]:
        """Recorded trials in order."""
        return tuple(self._trials)

    @property
    def history(self) -> pd.DataFrame:
        """Recorded trials as a DataFrame: number, config, score, status, source."""
        return pd.DataFrame(
            {
                "number": [t.number for t in self._trials],
                "config": [t.config for t in self._trials],
                "score": np.array([np.nan if t.score is None else t.score for t in self._trials],
                                  dtype=float),
                "status": [t.status for t in self._trials],
                "source": [t.source for t in self._trials],
            }
        )

    @property
    def best(self) -> Trial | None:
        """The best successful trial so far (the first of equals), or None."""
        y = self.signed_scores()
        if y.size == 0 or np.isnan(y).all():
            return None
        return self._trials[int(np.nanargmax(y))]

    def rows(self) -> np.ndarray:
        """Encoded rows of the recorded trials, shape (n, d)."""
        return self._rows[: len(self._trials)]

    def signed_scores(self) -> np.ndarray:
        """Scores oriented so that larger is better; NaN for failed trials."""
        return self._signed[: len(self._trials)]

    def _raw_scores(self) -> np.ndarray:
        y = self.signed_scores()
        return y if self.maximize else -y

    def _ok_mask(self) -> np.ndarray:
        return ~np.isnan(self.signed_scores())

    def pending_rows(self) -> np.ndarray:
        """Encoded rows of the pending configs (repeats included), shape (m, d)."""
        rows = [entry[2] for entry in self._pending.values() for _ in range(entry[3])]
        return np.array(rows).reshape(len(rows), self.space.dim)

    def _is_known(self, row: np.ndarray) -> bool:
        """Whether an encoded row was recorded already or is pending."""
        return bool(self._known_rows(row[None, :])[0])

    def _known_rows(self, X: np.ndarray) -> np.ndarray:
        """Boolean mask of the encoded rows recorded already or pending."""
        R = np.ascontiguousarray(_key_rows(X), dtype=float)
        known, pending = self._known, {e[4] for e in self._pending.values()}
        raw, width = R.tobytes(), R.shape[1] * R.itemsize  # row i's key (_row_key) is raw[i*width:(i+1)*width]
        return np.fromiter(((k := raw[i:i + width]) in known or k in pending for i in range(0, len(raw), width)),
                           dtype=bool, count=R.shape[0])

    def __repr__(self) -> str:
        best = self.best
        shown = "none" if best is None else f"{best.score:.6g}"
        return f"{type(self).__name__}(trial_count={self.trial_count}, best={shown})"


@dataclass(frozen=True, eq=False)
class SearchResult:
    """Outcome of :func:`run_search`.

    Attributes
    ----------
    trials : tuple of Trial
        Every evaluated trial, in the order recorded.
    maximize : bool
        Whether larger scores are better.
    """

    trials: tuple
    maximize: bool

    @property
    def configs(self) -> list[dict]:
        return [t.config for t in self.trials]

    @property
    def scores(self) -> np.ndarray:
        """Scores, NaN for failed trials."""
        return np.array([np.nan if t.score is None else t.score for t in self.trials], dtype=float)

    @property
    def statuses(self) -> list[str]:
        return [t.status for t in self.trials]

    @property
    def best_so_far(self) -> np.ndarray:
        """Best score after each trial (NaN until the first success)."""
        acc = np.fmax.accumulate if self.maximize else np.fmin.accumulate
        s = self.scores
        return acc(s) if s.size else s

    @property
    def best(self) -> Trial | None:
        """The best successful trial, or None."""
        s = self.scores
        if s.size == 0 or np.isnan(s).all():
            return None
        return self.trials[int(np.nanargmax(s) if self.maximize else np.nanargmin(s))]

    def to_frame(self) -> pd.DataFrame:
        """One row per trial: number, config, score, status, best_so_far,
        source, cost_s, started_at, finished_at, error, fold_scores."""
        frame = pd.DataFrame([dataclasses.asdict(t) for t in self.trials],
                             columns=[f.name for f in dataclasses.fields(Trial)])
        frame["score"] = self.scores
        frame.insert(4, "best_so_far", self.best_so_far)
        return frame

    def __repr__(self) -> str:
        best = self.best
        n_failed = sum(t.status == "failed" for t in self.trials)
        shown = "none" if best is None else f"{best.score:.6g}"
        return f"SearchResult(trial_count={len(self.trials)}, n_failed={n_failed}, best={shown})"


def _evaluate(objective: Callable, config: dict) -> TrialResult:
    """Evaluate one config; never raises an ``Exception`` (module level so
    executors can pickle it).

    An objective's own :class:`~warmstart.evaluate.result.TrialResult` is
    kept whole; a bare score is wrapped with the wall time measured here; an
    exception, ``None``, NaN, infinity or a non-number is a failed result
    naming what happened.
    """
    started_at, started = utc_now(), time.perf_counter()
    try:
        value = objective(dict(config))
    except Exception as exc:  # the objective's failure is a failed trial
        return TrialResult.failed(error_text(exc), started, started_at)
    return TrialResult.from_value(value, started, started_at)


def run_search(
    strategy: SearchStrategy,
    objective: Callable[[dict], float],
    budget: int,
    callback: Callable[[Trial], Any] | None = None,
    n_workers: int = 1,
    executor: cf.Executor | None = None,
) -> SearchResult:
    """Evaluate an objective with a search strategy for a number of trials.

    Parameters
    ----------
    strategy : SearchStrategy
        Any strategy (:class:`~warmstart.search.density.DensitySearch` or a baseline).
    objective : callable
        ``objective(config) -> TrialResult`` (kept whole in the
        :class:`Trial`: fold scores, cost, error text) or ``-> score``. An
        exception, ``None``, NaN or an infinite value records a failed trial
        (with the error text); the loop goes on.
    budget : int
        Number of trials to evaluate.
    callback : callable, optional
        Called with each :class:`Trial` right after it is recorded (for
        instance to write it to the archive, so an interrupted search keeps
        what it finished).
    n_workers : int, default 1
        Evaluations in flight at once. Above 1, configs are proposed in
        batches (pending ones count as tried) and evaluated by ``executor``
        or a thread pool; results are recorded as they finish, so the order
        can vary between runs.
    executor : concurrent.futures.Executor, optional
        Where to evaluate (a process pool, a Dask cluster's
        :class:`~warmstart.evaluate.cluster.ClusterPool` ...); the objective
        must then be picklable. Without one, ``n_workers > 1`` evaluates in
        a thread pool and 1 in this process.

    Returns
    -------
    SearchResult
    """
    if not callable(objective):
        raise SearchError(f"objective must be callable, got {objective!r}")
    check_count("budget", budget, minimum=0, error=SearchError)
    check_count("n_workers", n_workers, minimum=1, error=SearchError)
    done: list[Trial] = []

    def finish(config: dict, result: TrialResult) -> None:
        trial = strategy.record(config, result.score, result.status)
        trial = dataclasses.replace(trial, number=len(done), cost_s=result.cost_s, started_at=result.started_at,
                                    finished_at=result.finished_at, error=result.error,
                                    fold_scores=tuple(float(v) for v in result.fold_scores))
        done.append(trial)
        if callback is not None:
            callback(trial)

    if n_workers == 1 and executor is None:
        for _ in range(int(budget)):
            config = strategy.propose()
            finish(config, _evaluate(objective, config))
        return SearchResult(tuple(done), strategy.maximize)

    own = executor is None
    pool = cf.ThreadPoolExecutor(max_workers=int(n_workers)) if own else executor
    try:
        running: dict[cf.Future, tuple[int, dict]] = {}
        submitted = 0
        while submitted < budget or running:
            free = min(int(n_workers) - len(running), int(budget) - submitted)
            if free > 0:
                for config in strategy.propose(free):
                    running[pool.submit(_evaluate, objective, config)] = (submitted, config)
                    submitted += 1
            finished = wait_first(running)
            for fut in sorted(finished, key=lambda f: running[f][0]):
                _, config = running.pop(fut)
                finish(config, fut.result())
    finally:
        if own:
            pool.shutdown(wait=True, cancel_futures=True)
    return SearchResult(tuple(done), strategy.maximize)
