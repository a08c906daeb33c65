"""The one writer: every write of the service passes through one thread.

Each write is a function of the archive run inside one DuckDB transaction;
its answer is handed back only after the commit, so a client that got an
answer holds a result that survives a crash. A write may carry a client
request id: its answer is stored in the same transaction, and a retry with
the same id gets the stored answer and writes nothing (also after a restart,
since the answer lives in the archive). Reads do not pass through here: they
run concurrently on cursors of their own (:meth:`Archive.reader`).

Group commit: the writes waiting in the queue when the thread gets to them
(up to :data:`MAX_BATCH`) run in one transaction, so one commit (one flush of
DuckDB's log) serves many requests; each is still answered only after that
commit. Results (``early`` writes) run before proposals in a batch, so a
search learns every new score once, before it proposes. When one write of
a batch fails, the batch is rolled back and every write of it runs again
alone, in its own transaction: the failing one fails by itself, the others
commit as if they had come one by one. A write refused before it changed
anything (:class:`~warmstart.service.errors.Refused`: an unknown study or
trial, a repeat with another result ...) fails alone without undoing its
batch.
"""

from __future__ import annotations

import asyncio
import concurrent.futures as cf
import json
import logging
import queue
import threading
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any, Callable

from warmstart.archive.store import Archive
from warmstart.service.errors import Refused, ServiceError
from warmstart.service.rowbuffer import insert_rows
from warmstart.service.seen import SeenRequests

__all__ = ["Writer", "RequestKey", "Answer", "Later", "REQUEST_RETENTION_DAYS", "MAX_BATCH"]

log = logging.getLogger("warmstart.service")
REQUEST_RETENTION_DAYS = 30  # stored answers to request ids older than this are dropped at start-up
MAX_BATCH = 64  # writes committed together at most (a batch waits for nothing: it is what is queued)
_REQUEST_COLUMNS = ("principal", "request_id", "route", "body_sha256", "status", "response", "created_at")
_REQUEST_TYPES = ("VARCHAR", "VARCHAR", "VARCHAR", "VARCHAR", "INTEGER", "VARCHAR", "TIMESTAMP")


def _now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


@dataclass(frozen=True)
class RequestKey:
    """A client's request id with what identifies the request it was sent with."""

    principal: str
    request_id: str
    route: str
    body_sha256: str


@dataclass(frozen=True)
class Answer:
    """What a write answered: status and the JSON text of its body (as stored
    for a retry); ``replayed`` when it is the stored answer of an earlier
    request with the same id."""

    status: int
    text: str
    replayed: bool = False

    @property
    def body(self) -> Any:
        """The body, decoded."""
        return json.loads(self.text)


class Later:
    """A write's answer body that is filled in before its batch commits.

    The write returns ``(status, Later())`` and whoever draws the body calls
    :meth:`fill` in the batch's ``before_commit`` at the latest; the writer
    reads :meth:`body` after that.
    """

    __slots__ = ("_body", "_filled")

    def __init__(self) -> None:
        self._body: Any = None
        self._filled = False

    def fill(self, body: Any) -> None:
        """Set the body."""
        self._body, self._filled = body, True

    def body(self) -> Any:
        """The body (a RuntimeError if nobody filled it before the commit)."""
        if not self._filled:
            raise RuntimeError("a write's answer was not filled in before its batch committed")
        return self._body


@dataclass
class _Job:
    fn: Callable[[Archive], tuple[int, Any]]
    key: RequestKey | None
    future: cf.Future | None  # for a caller in a thread
    early: bool = False
    reply: asyncio.Future | None = None  # for a caller in an event loop (one wake-up per batch)

    def start(self) -> bool:
        """Mark the job running; False when its caller gave up (cancelled) before."""
        if self.reply is not None:
            return not self.reply.cancelled()  # read across threads: a late cancel only loses the answer
        return self.future.set_running_or_notify_cancel()


class Writer:
    """The single writing thread over an archive opened for writing.

    Parameters
    ----------
    archive : Archive
        Opened for writing; only this thread writes to it from now on.
    on_commit, on_failure : callable, optional
        Called (in the writer thread) after a write committed, or after it
        was rolled back, so that caches derived from the archive can follow.
    before_commit : callable, optional
        Called with the archive inside a batch's transaction after its writes
        ran (e.g. to write the rows they left for one statement per table);
        when it fails the batch is rolled back as if one of its writes had.
    """

    def __init__(self, archive: Archive, on_commit: Callable[[], None] | None = None,
                 on_failure: Callable[[], None] | None = None,
                 before_commit: Callable[[Archive], None] | None = None):
        self.archive = archive
        self._on_commit = on_commit
        self._on_failure = on_failure
        self._before_commit = before_commit
        self._queue: queue.Queue[_Job | None] = queue.Queue()
        self._thread = threading.Thread(target=self._run, name="warmstart-writer", daemon=True)
        self._closed = False
        self._lock = threading.Lock()
        self._seen: SeenRequests | None = None  # request ids stored: built at start (or first use)

    def start(self) -> None:
        """Start the thread (drops stored answers older than the retention first)."""
        cutoff = _now() - timedelta(days=REQUEST_RETENTION_DAYS)
        with self.archive.transaction() as con:
            con.execute("DELETE FROM requests WHERE created_at < ?", [cutoff])
        self._seen = SeenRequests.load(self.archive.con)
        self._thread.start()

    def submit(self, fn: Callable[[Archive], tuple[int, Any]], key: RequestKey | None = None,
               early: bool = False) -> cf.Future:
        """Queue a write; the future resolves to an :class:`Answer` after the commit.

        ``fn(archive)`` returns ``(status, body)``, body JSON-able; it raises
        :class:`ServiceError` (or a library error) to refuse, which rolls
        the transaction back. ``early`` writes (results) go before the
        others of their batch.
        """
        future: cf.Future = cf.Future()
        self._put(_Job(fn, key, future, early))
        return future

    def submit_async(self, fn: Callable[[Archive], tuple[int, Any]], key: RequestKey | None = None,
                     early: bool = False) -> asyncio.Future:
        """:meth:`submit` for a caller in a running event loop: the answers of a
        batch go back to their loop together, one wake-up for the batch instead
        of one per request."""
        reply = asyncio.get_running_loop().create_future()
        self._put(_Job(fn, key, None, early, reply))
        return reply

    def _put(self, job: _Job) -> None:
        with self._lock:
            if self._closed:
                raise ServiceError(503, "the service is shutting down; try again when it is back")
            self._queue.put(job)

    def close(self, timeout: float = 30.0) -> None:
        """Finish the queued writes, then stop the thread."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
            self._queue.put(None)
        if self._thread.is_alive():
            self._thread.join(timeout)

    @property
    def backlog(self) -> int:
        """Writes waiting in the queue."""
        return self._queue.qsize()

    # -- the thread ----------------------------------------------------------
    def _run(self) -> None:
        stop = False
        while not stop:
            job = self._queue.get()
            if job is None:
                return
            batch = [job]
            while len(batch) < MAX_BATCH:
                try:
                    more = self._queue.get_nowait()
                except queue.Empty:
                    break
                if more is None:
                    stop = True
                    break
                batch.append(more)
            batch = [j for j in batch if j.start()]
            batch.sort(key=lambda j: not j.early)  # stable: results first, else in arrival order
            if batch:
                self._run_batch(batch)

    def _run_batch(self, batch: list[_Job]) -> None:
        """The batch in one transaction; when a write of it fails, each of its writes alone."""
        try:
            with self.archive.transaction():
                outcomes = self._execute(batch)
        except BaseException as exc:  # rolled back: nothing of the batch stands
            self._dropped()
            if len(batch) == 1:
                _settle(batch, [exc])  # handed to the waiting request, never lost
            else:
                for job in batch:
                    self._run_batch([job])
            return
        # every id of the committed batch (a refused one too: it only costs a lookup if it comes again)
        self._seen.add((job.key.principal, job.key.request_id) for job in batch if job.key is not None)
        self._committed()
        _settle(batch, outcomes)

    def _committed(self) -> None:
        if self._on_commit is not None:
            self._on_commit()

    def _dropped(self) -> None:
        if self._on_failure is not None:
            try:
                self._on_failure()
            except Exception:  # pragma: no cover - a cache drop cannot fail in practice
                log.exception("dropping caches after a failed write")

    def _execute(self, batch: list[_Job]) -> list[Answer | ServiceError]:
        """Run the writes of a batch in the open transaction.

        Stored answers of their request ids (those :class:`SeenRequests` may
        hold) are read in one query and the new ones written in one statement
        at the end; a retry (a request id seen
        before, also earlier in this batch) gets its stored answer and runs
        nothing, a request id reused for another request gets a 422 (both
        write nothing, so they fail no other write of the batch).
        """
        con = self.archive.con
        if self._seen is None:
            self._seen = SeenRequests.load(con)
        # only ids that may have been stored are looked up (a retry; a new id needs no query)
        keys = [job.key for job in batch if job.key is not None and self._seen.may_hold(job.key.principal,
                                                                                         job.key.request_id)]
        #: (principal, request id) -> (route, body digest, status, stored text or [body of this batch])
        stored: dict[tuple[str, str], tuple[str, str, int, Any]] = {}
        if keys:
            rows = con.execute(
                "SELECT r.principal, r.request_id, r.route, r.body_sha256, r.status, r.response FROM requests r "
                "JOIN (SELECT unnest(?::VARCHAR[]) AS p, unnest(?::VARCHAR[]) AS i) k "
                "ON r.principal = k.p AND r.request_id = k.i",
                [[k.principal for k in keys], [k.request_id for k in keys]],
            ).fetchall()
            stored = {(p, i): (route, digest, int(status), text) for p, i, route, digest, status, text in rows}
        #: per write: an Answer, a ServiceError, or (status, body, replayed) until the bodies are filled
        outcomes: list = []
        fresh: list[tuple[RequestKey, int]] = []  # (key, index of its outcome)
        for job in batch:
            k = job.key
            if k is not None and (k.principal, k.request_id) in stored:
                route, digest, status, text = stored[(k.principal, k.request_id)]
                if route != k.route or digest != k.body_sha256:
                    outcomes.append(ServiceError(
                        422, f"request id {k.request_id!r} was used before for another request ({route}); "
                        "a retry must send the same body to the same address, a new request needs a new id",
                        "Idempotency-Key", k.request_id))
                elif isinstance(text, list):  # the same request earlier in this batch: its body, once filled
                    outcomes.append((status, text[0], True))
                else:
                    outcomes.append(Answer(status, text, replayed=True))
                continue
            try:
                status, body = job.fn(self.archive)
            except Refused as exc:  # refused before it changed anything: the batch goes on
                outcomes.append(exc)
                continue
            if k is not None:
                stored[(k.principal, k.request_id)] = (k.route, k.body_sha256, status, [body])
                fresh.append((k, len(outcomes)))
            outcomes.append((status, body, False))
        if self._before_commit is not None:
            self._before_commit(self.archive)
        for i, outcome in enumerate(outcomes):
            if isinstance(outcome, tuple):
                status, body, replayed = outcome
                body = body.body() if isinstance(body, Later) else body
                outcomes[i] = Answer(status, json.dumps(body, allow_nan=False), replayed=replayed)
        fresh = [(k, outcomes[i].status, outcomes[i].text) for k, i in fresh]
        if fresh:
            now = _now()
            insert_rows(con, "requests", _REQUEST_COLUMNS, _REQUEST_TYPES,
                        [(k.principal, k.request_id, k.route, k.body_sha256, status, text, now)
                         for k, status, text in fresh])
        return outcomes


def _settle(batch: list[_Job], outcomes: list) -> None:
    """Hand each job its outcome (an exception is raised to its caller); the
    jobs of one event loop get theirs in one call into that loop."""
    by_loop: dict[Any, list[tuple[asyncio.Future, Any]]] = {}
    for job, outcome in zip(batch, outcomes):
        if job.reply is not None:
            by_loop.setdefault(job.reply.get_loop(), []).append((job.reply, outcome))
        elif isinstance(outcome, BaseException):
            job.future.set_exception(outcome)
        else:
            job.future.set_result(outcome)
    for loop, replies in by_loop.items():
        try:
            loop.call_soon_threadsafe(_deliver, replies)
        except RuntimeError:  # the loop closed meanwhile: nobody waits for these answers
            log.warning("%d answers not delivered: their event loop has closed", len(replies))


def _deliver(replies: list[tuple[asyncio.Future, Any]]) -> None:
    for reply, outcome in replies:
        if reply.done():  # the request was cancelled (its client went away)
            continue
        if isinstance(outcome, BaseException):
            reply.set_exception(outcome)
        else:
            reply.set_result(outcome)
