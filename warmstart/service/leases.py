"""Leases: a proposal is a pending trial with an id and an expiry.

Parallel workers asking the same study for configs get distinct ones: every
config leased and not yet recorded is *pending* in the study's search (the
"constant liar" of :class:`~warmstart.search.density.DensitySearch`, as
``propose -k`` does), so the next proposals move away from it. A worker
records its result by the lease's trial id; the same trial recorded twice with
the same result is accepted once and reported as a repeat, with another result
it is refused. A lease that expires is released from the search and its
config may be proposed again; a late result for it is still recorded.

Every method here runs in the writer thread (:mod:`warmstart.service.writer`),
inside the transaction of the request: the leases live in the archive
(table ``leases``), the searches built from them in memory. A write that
fails drops the searches it touched (:meth:`LeaseBook.abort`), so memory
never runs ahead of what was committed.
"""

from __future__ import annotations

import contextlib
import json
import math
from datetime import datetime, timedelta, timezone
from typing import Any

from warmstart.errors import SpaceError, WarmstartError
from warmstart.search.strategy import SearchStrategy
from warmstart.service.errors import Refused, ServiceError
from warmstart.service.searches import resume_search

__all__ = ["LeaseBook", "DEFAULT_LEASE_SECONDS"]

DEFAULT_LEASE_SECONDS = 3600.0
MAX_DRAWS = 8  # extra proposals tried when one repeats a pending config


def _now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


def _stamp(moment: datetime) -> str:
    return moment.replace(microsecond=moment.microsecond // 1000 * 1000).isoformat() + "Z"


class LeaseBook:
    """The studies' searches and their leases.

    Parameters
    ----------
    lease_seconds : float, default 3600
        Life of a lease when the request gives none.
    query_lock : threading.Lock, optional
        Taken while a search is rebuilt (a warm one builds its prior with the
        queries that readers also run).
    """

    def __init__(self, lease_seconds: float = DEFAULT_LEASE_SECONDS, query_lock=None):
        self.lease_seconds = float(lease_seconds)
        self.query_lock = query_lock or contextlib.nullcontext()
        #: per study, kept together and dropped together: the search, the canonical JSON of its
        #: pending leases' configs, and the earliest expiry among them (None: no pending lease)
        self._searches: dict[int, SearchStrategy] = {}
        self._pending: dict[int, set[str]] = {}
        self._due: dict[int, datetime | None] = {}
        self._touched: set[int] = set()

    # -- cache of searches ---------------------------------------------------
    def adopt(self, study: int, search: SearchStrategy) -> None:
        """Keep the search a new study starts with (it has no leases yet)."""
        study = int(study)
        self._searches[study], self._pending[study], self._due[study] = search, set(), None
        self._touched.add(study)

    def abort(self) -> None:
        """Forget the searches touched since the last commit (the write failed)."""
        for study in self._touched:
            self.forget(study)
        self._touched.clear()

    def committed(self) -> None:
        """The write went through: what it changed in memory stands."""
        self._touched.clear()

    def forget(self, study: int | None = None) -> None:
        """Drop the cached search of one study (or all), with its leases' summary."""
        if study is None:
            self._searches.clear()
            self._pending.clear()
            self._due.clear()
        else:
            for table in (self._searches, self._pending, self._due):
                table.pop(int(study), None)

    def _search(self, archive, study: int) -> SearchStrategy:
        """The study's search (built on first use: 404 for an unknown study), its
        pending leases held."""
        self._touched.add(study)
        search = self._searches.get(study)
        if search is None:
            _exists_or_404(archive, study)
            with self.query_lock:
                _, search = resume_search(archive, study)
            rows = archive.con.execute(
                "SELECT config, expires_at FROM leases WHERE study_id = ? AND state = 'pending' ORDER BY trial_id",
                [study]).fetchall()
            for config, _ in rows:
                search.hold(json.loads(config), source="lease")
            self._searches[study] = search
            self._pending[study] = {config for config, _ in rows}
            self._due[study] = min((until for _, until in rows), default=None)
        return search

    # -- expiry ----------------------------------------------------------------
    def _expire(self, archive, study: int, search: SearchStrategy) -> int:
        due = self._due.get(study)
        if due is None or _now() < due:  # nothing pending has expired: no query
            return 0
        rows = archive.con.execute(
            "UPDATE leases SET state = 'expired' WHERE study_id = ? AND state = 'pending' AND expires_at <= ? "
            "RETURNING config", [study, _now()],
        ).fetchall()
        pending = self._pending[study]
        for (config,) in rows:
            search.release(json.loads(config))
            pending.discard(config)
        self._due[study] = archive.con.execute(
            "SELECT min(expires_at) FROM leases WHERE study_id = ? AND state = 'pending'", [study]).fetchall()[0][0]
        return len(rows)

    # -- propose -----------------------------------------------------------------
    def propose(self, archive, study: int, k: int, seconds: float | None, owner: str | None) -> dict:
        """Lease ``k`` distinct configs of ``study``; returns the answer body."""
        search = self._search(archive, study)
        expired = self._expire(archive, study, search)
        space = search.space
        pending = self._pending[study]
        leased: list[tuple[str, dict]] = []
        for _ in range(k):
            for _attempt in range(MAX_DRAWS + 1):
                config = search.propose()
                key = space.canonical_json(config)
                if key not in pending:
                    break
                search.release(config)  # a repeat of a pending config: not handed out
            else:
                raise ServiceError(
                    409, f"study {study}: no config left that is not pending already ({len(pending)} leased); "
                    "record or let some leases expire, or ask for fewer", "k", k)
            pending.add(key)
            leased.append((key, config))
        now = _now()
        until = now + timedelta(seconds=self.lease_seconds if seconds is None else float(seconds))
        rows = archive.con.execute(
            "INSERT INTO leases (trial_id, study_id, config, owner, created_at, expires_at, state) "
            "SELECT nextval('trial_ids'), ?, c, ?, ?, ?, 'pending' FROM unnest(?::VARCHAR[]) AS u(c) "
            "RETURNING trial_id, config",
            [study, owner, now, until, [key for key, _ in leased]],
        ).fetchall()
        ids = {config: int(trial) for trial, config in rows}  # the configs are distinct
        due = self._due.get(study)
        self._due[study] = until if due is None else min(due, until)
        return {
            "study_id": study,
            "leases": [{"trial": ids[key], "config": c, "expires_at": _stamp(until)} for key, c in leased],
            "expired": expired,
            "trial_count": search.trial_count,
        }

    # -- record --------------------------------------------------------------------
    def record(self, archive, study: int, trial: int | None, config: dict | None, score: float | None,
               status: str, error: str | None, cost_s: float | None, owner: str | None) -> dict:
        """Record a result by lease (``trial``) or by ``config``; returns the answer body."""
        search = self._search(archive, study)
        if (trial is None) == (config is None):
            raise Refused(422, "give either trial (the id of a lease) or config (a config never proposed)",
                               "trial", trial)
        if status == "ok" and score is None:
            raise Refused(422, "score is required for status 'ok'; send status 'failed' for a failed trial",
                               "score", None)
        if status == "failed":
            score = None
            error = error or "failed (reported without error text)"
        repeat = False
        if trial is not None:
            rows = archive.con.execute(
                "SELECT study_id, config, state, number, status, score FROM leases WHERE trial_id = ?", [trial]
            ).fetchall()
            if not rows:
                raise Refused(404, f"no trial with id {trial}; trial ids come from propose", "trial", trial)
            owner_study, key, state, number, was_status, was_score = rows[0]
            if int(owner_study) != study:
                raise Refused(409, f"trial {trial} is a lease of study {owner_study}, not of study {study}",
                                   "trial", trial)
            if state == "recorded":
                if was_status == status and _same(was_score, score):
                    repeat = True
                else:
                    raise Refused(
                        409, f"trial {trial} was recorded already with {_result(was_status, was_score)}; "
                        f"a different result ({_result(status, score)}) is refused", "score", score)
            else:
                config = json.loads(key)
        else:
            try:
                key = search.space.canonical_json(config)
            except SpaceError as exc:
                raise Refused(422, f"config: {exc}", "config", config) from None
            config = json.loads(key)
        if not repeat:
            self._expire(archive, study, search)
            try:
                number = archive.record_trial(study, config, score, status=status, cost_s=cost_s, error=error)
            except WarmstartError as exc:  # e.g. an accuracy above 1 for a built-in metric
                raise ServiceError(422, str(exc), "score", score) from None
            now = _now()
            if trial is None:
                trial = int(archive.con.execute(
                    "INSERT INTO leases VALUES (nextval('trial_ids'), ?, ?, ?, ?, ?, 'recorded', ?, ?, ?, ?) "
                    "RETURNING trial_id", [study, key, owner, now, now, number, status, score, now],
                ).fetchall()[0][0])
            else:
                archive.con.execute(
                    "UPDATE leases SET state = 'recorded', number = ?, status = ?, score = ?, recorded_at = ? "
                    "WHERE trial_id = ?", [number, status, score, now, trial],
                )
            self._pending[study].discard(key)
            search.record(config, score, status)
        best = search.best  # the search holds every recorded trial of the study, as committed
        return {
            "study_id": study, "trial": int(trial), "number": int(number), "status": status, "score": score,
            "repeat": repeat, "trial_count": search.trial_count,
            "best_score": None if best is None else float(best.score),
        }


def _same(a: Any, b: Any) -> bool:
    if a is None or b is None:
        return a is None and b is None
    a, b = float(a), float(b)
    return a == b or (math.isnan(a) and math.isnan(b))


def _result(status: str, score: Any) -> str:
    return "status failed" if status == "failed" else f"score {score!r}"


def _exists_or_404(archive, study: int) -> None:
    if not archive.con.execute("SELECT 1 FROM studies WHERE study_id = ?", [study]).fetchall():
        raise Refused(404, f"no study with id {study}; GET /api/v1/studies lists them", "study_id", study)
