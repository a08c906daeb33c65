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
(table ``leases``), the searches built from them in memory, in this process
or in a child process of their own (:mod:`warmstart.service.proposer`), and
the book keeps each study's pending leases, next trial number, trial count
and best score, so a proposal or a result by lease reads nothing from the
archive and a result waits for nothing from the searches.

A proposal takes its trial ids and expiry at once and answers with a
:class:`~warmstart.service.writer.Later` body: the configs of every
proposal of a batch are drawn together, in the order asked, when the batch
settles (:meth:`LeaseBook.flush`, run by the writer before the commit, or
before anything else is asked of the searches), in one exchange with them;
the rows of the batch's results are written while the searches draw. The
searches see the same calls in the same order as if each proposal had drawn
at once, so the proposals are the same. The rows a write leaves (leases,
trials) wait in a :class:`~warmstart.service.rowbuffer.RowBuffer` that the
writer flushes before its batch commits, one statement per table. A write
that fails drops the searches it touched and the rows not written
(:meth:`LeaseBook.abort`), in the child process too, so memory never runs
ahead of what was committed. When the searches are lost (the child process
ended) the book drops every study it keeps, answers 503, and rebuilds each
study from the archive when it is used next.
"""

from __future__ import annotations

import contextlib
import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from typing import Any

from warmstart.errors import SpaceError, WarmstartError
from warmstart.search.strategy import SearchStrategy, classify_result
from warmstart.service.errors import Refused, ServiceError
from warmstart.service.proposer import InProcessProposer, NoConfigLeft, Proposer, SearchesLost
from warmstart.service.rowbuffer import RowBuffer, TrialIds
from warmstart.service.searches import resume_search
from warmstart.service.writer import Later
from warmstart.space import Space

__all__ = ["LeaseBook", "DEFAULT_LEASE_SECONDS"]

DEFAULT_LEASE_SECONDS = 3600.0


def _now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


def _stamp(moment: datetime) -> str:
    return moment.replace(microsecond=moment.microsecond // 1000 * 1000).isoformat() + "Z"


@dataclass
class _Study:
    """What the lease book keeps of one study, kept and dropped together (the
    search itself is the proposer's)."""

    space: Space
    maximize: bool
    next_number: int  # the number the study's next trial gets
    trial_count: int  # trials the search holds (ok and failed), as committed
    best_score: float | None = None  # the best ok score so far (the first of equals)
    #: pending leases: trial id -> (canonical JSON of the config, expiry)
    open: dict[int, tuple[str, datetime]] = field(default_factory=dict)
    due: datetime | None = None  # earliest expiry among the pending leases (None: none pending)

    @classmethod
    def of(cls, search: SearchStrategy, next_number: int) -> "_Study":
        best = search.best
        return cls(search.space, search.maximize, next_number, search.trial_count,
                   None if best is None else float(best.score))

    def counted(self, score: float | None, status: str) -> None:
        """A result recorded: the trial count and best score follow as the search's would."""
        value, _ = classify_result(score, status)
        self.trial_count += 1
        if value is not None and (self.best_score is None
                                  or (value > self.best_score if self.maximize else value < self.best_score)):
            self.best_score = value


@dataclass
class _Asked:
    """A proposal asked for in this batch: ids and expiry taken, configs drawn
    when the batch settles (:meth:`LeaseBook.flush`)."""

    study: int
    k: int
    state: _Study
    ids: list[int]
    owner: str | None
    now: datetime
    until: datetime
    expired: int
    trial_count: int
    answer: Later


class LeaseBook:
    """The studies' searches and their leases.

    Parameters
    ----------
    lease_seconds : float, default 3600
        Life of a lease when the request gives none.
    query_lock : threading.Lock, optional
        Taken while a search is rebuilt (a warm one builds its prior with the
        queries that readers also run).
    searches : Proposer, optional
        Where the searches live and compute; default
        :class:`~warmstart.service.proposer.InProcessProposer` (this process).
    """

    def __init__(self, lease_seconds: float = DEFAULT_LEASE_SECONDS, query_lock=None,
                 searches: Proposer | None = None):
        self.lease_seconds = float(lease_seconds)
        self.query_lock = query_lock or contextlib.nullcontext()
        self.searches = searches if searches is not None else InProcessProposer()
        self._studies: dict[int, _Study] = {}
        self._touched: set[int] = set()
        self._asked: list[_Asked] = []  # proposals of this batch not drawn yet
        self._rows = RowBuffer()
        self._ids = TrialIds()

    # -- cache of searches ---------------------------------------------------
    def adopt(self, study: int, search: SearchStrategy) -> None:
        """Keep the search a new study starts with (it has no leases or trials yet)."""
        study = int(study)
        self._settle()
        self._touched.add(study)
        state = _Study.of(search, next_number=1)
        with self._kept():
            self.searches.adopt(study, search)
        self._studies[study] = state

    @contextlib.contextmanager
    def _kept(self):
        """Around a call to the searches: when they are lost, drop every study kept
        here too and answer 503 (the batch is rolled back; each study is rebuilt
        from the archive when it is used next)."""
        try:
            yield
        except SearchesLost as exc:
            self._studies.clear()
            raise ServiceError(503, f"{exc}; nothing of this request was written", "searches") from None

    def flush(self, archive) -> None:
        """Draw the proposals asked for so far and write the rows the writes of
        this batch left (called before the commit, and before a read of the
        leases inside the batch). The rows that wait for no proposal (trials,
        recorded leases) are written while the searches draw."""
        collect = self._ask()
        try:
            self._rows.flush(archive)
        finally:
            self._settle(collect)
        self._rows.flush(archive)
        with self._kept():
            self.searches.sync()

    def _ask(self):
        """Send every proposal asked for since the last settle to the searches, in
        one exchange (in the order asked); returns what :meth:`_settle` takes."""
        if not self._asked:
            return None
        asked, self._asked = self._asked, []
        with self._kept():
            return asked, self.searches.ask_many([(a.study, a.k) for a in asked])

    def _settle(self, collect=False) -> None:
        """The configs drawn for the proposals asked for (asks first when not
        given): their answers and lease rows filled in."""
        if collect is False:
            collect = self._ask()
        if collect is None:
            return
        asked, answer = collect
        try:
            with self._kept():
                drawn = answer()
        except NoConfigLeft as exc:
            raise ServiceError(409, f"study {exc.study}: {exc}; record or let some leases expire, or ask for fewer",
                               "k", exc.k) from None
        for a, leased in zip(asked, drawn):
            for trial, (key, _) in zip(a.ids, leased):
                self._rows.add_lease(trial, a.study, key, a.owner, a.now, a.until)
                a.state.open[trial] = (key, a.until)
            a.answer.fill({
                "study_id": a.study,
                "leases": [{"trial": trial, "config": c, "expires_at": _stamp(a.until)}
                           for trial, (_, c) in zip(a.ids, leased)],
                "expired": a.expired,
                "trial_count": a.trial_count,
            })

    def abort(self) -> None:
        """Forget the searches touched since the last commit and the rows not
        written (the write failed and was rolled back)."""
        self._asked.clear()  # never drawn: their answers are not given
        for study in self._touched:
            self.forget(study)
        self._touched.clear()
        self._rows.clear()
        self._ids.drop()

    def committed(self) -> None:
        """The write went through: what it changed in memory stands."""
        self._touched.clear()

    def forget(self, study: int | None = None) -> None:
        """Drop the cached search of one study (or all), with its leases' summary."""
        self._settle()
        if study is None:
            self._studies.clear()
        else:
            self._studies.pop(int(study), None)
        try:
            self.searches.forget(study)
        except SearchesLost:  # gone with every other search: nothing of them is kept here either
            self._studies.clear()

    def close(self) -> None:
        """Drop every search (and stop the search process, if any)."""
        self._asked.clear()
        self._studies.clear()
        self.searches.close()

    def _study(self, archive, study: int) -> _Study:
        """The study's state (built on first use: 404 for an unknown study), its
        search holding the pending leases."""
        self._touched.add(study)
        state = self._studies.get(study)
        if state is None:
            self.flush(archive)
            _exists_or_404(archive, study)
            with self.query_lock:
                _, search = resume_search(archive, study)
            rows = archive.con.execute(
                "SELECT trial_id, config, expires_at FROM leases WHERE study_id = ? AND state = 'pending' "
                "ORDER BY trial_id", [study]).fetchall()
            state = _Study.of(search, next_number=archive.next_trial_number(study))
            state.open = {int(trial): (config, until) for trial, config, until in rows}
            state.due = min((until for _, _, until in rows), default=None)
            with self._kept():
                self.searches.adopt(study, search, held=[config for _, config, _ in rows])
            self._studies[study] = state
        return state

    # -- expiry ----------------------------------------------------------------
    def _expire(self, archive, study: int, state: _Study) -> int:
        if state.due is None or _now() < state.due:  # nothing pending has expired: no query
            return 0
        self._settle()  # leases asked for in this batch may be among the expired ones
        now = _now()
        gone = sorted(trial for trial, (_, until) in state.open.items() if until <= now)
        if gone:
            self.flush(archive)
            archive.con.execute(
                "UPDATE leases SET state = 'expired' WHERE state = 'pending' AND trial_id IN "
                "(SELECT unnest(?::BIGINT[]))", [gone])
        with self._kept():
            self.searches.release(study, [state.open.pop(trial)[0] for trial in gone])
        state.due = min((until for _, until in state.open.values()), default=None)
        return len(gone)

    # -- propose -----------------------------------------------------------------
    def propose(self, archive, study: int, k: int, seconds: float | None, owner: str | None) -> Later:
        """Lease ``k`` distinct configs of ``study``; returns the answer body,
        filled in when the batch settles (:meth:`flush`, before its commit)."""
        state = self._study(archive, study)
        expired = self._expire(archive, study, state)
        now = _now()
        until = now + timedelta(seconds=self.lease_seconds if seconds is None else float(seconds))
        answer = Later()
        self._asked.append(_Asked(study, int(k), state, self._ids.take(archive, k), owner, now, until, expired,
                                  state.trial_count, answer))
        state.due = until if state.due is None else min(state.due, until)
        return answer

    # -- record --------------------------------------------------------------------
    def record(self, archive, study: int, trial: int | None, config: dict | None, score: float | None,
               status: str, error: str | None, cost_s: float | None, owner: str | None) -> dict:
        """Record a result by lease (``trial``) or by ``config``; returns the answer body."""
        self._settle()  # the searches hear of everything in the order it was asked
        state = self._study(archive, study)
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
        number = None
        if trial is not None:
            if trial in state.open:  # a pending lease of this study: no query
                key = state.open[trial][0]
                config = json.loads(key)
            else:
                key, config, repeat, number = self._lease_not_open(archive, study, trial, status, score)
        else:
            try:
                key = state.space.canonical_json(config)
            except SpaceError as exc:
                raise Refused(422, f"config: {exc}", "config", config) from None
            config = json.loads(key)
        if not repeat:
            try:
                row = archive.check_trial(study, config, score, status=status, cost_s=cost_s, error=error)
            except WarmstartError as exc:  # e.g. an accuracy above 1 for a built-in metric
                raise Refused(422, str(exc), "score", score) from None
            self._expire(archive, study, state)
            number = state.next_number
            state.next_number += 1
            self._rows.add_trial(study, row, number)
            now = _now()
            if trial is None:
                trial = self._ids.take(archive, 1)[0]
                self._rows.add_lease(trial, study, key, owner, now, now, "recorded", number, status, score, now)
            else:
                self._rows.recorded.append((trial, number, status, score, now))
                state.open.pop(trial, None)
            state.counted(score, status)
            with self._kept():
                self.searches.record(study, key, score, status)
        return {  # the search holds every recorded trial of the study, as committed
            "study_id": study, "trial": int(trial), "number": int(number), "status": status, "score": score,
            "repeat": repeat, "trial_count": state.trial_count, "best_score": state.best_score,
        }

    def _lease_not_open(self, archive, study: int, trial: int, status: str,
                        score: float | None) -> tuple[str, dict | None, bool, int | None]:
        """A trial id that is no pending lease of this study: recorded already (a
        repeat, or a different result refused), expired (recorded late), another
        study's, or unknown. Returns (config JSON, config, repeat, number)."""
        self.flush(archive)
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
                return key, None, True, int(number)
            raise Refused(409, f"trial {trial} was recorded already with {_result(was_status, was_score)}; "
                          f"a different result ({_result(status, score)}) is refused", "score", score)
        return key, json.loads(key), False, None


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
