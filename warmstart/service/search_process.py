"""The studies' searches in a child process, so they compute on another core.

Python runs one thread at a time in a process, so a service that proposes
in its writer thread while its event loop serves HTTP uses about one core.
:class:`ChildProcessProposer` keeps the searches in a process of its own
(started with multiprocessing's ``spawn`` method: a fresh interpreter, never
a fork of a process that runs threads) and sends it the messages of
:mod:`warmstart.service.proposer` through a pipe; the child applies each
exactly as the in-process proposer would. A search is built in the service
process (a resumed one needs the archive, which only the service opens) and
sent pickled once, when its study is adopted; after that only small
messages go: a proposal waits for its answer, everything else is kept and
sent with the next proposal (or at :meth:`ChildProcessProposer.sync`), so
that a batch of the writer costs one exchange with the child. Every system
call lets the service's other threads take Python's lock, and the writer
then waits for it back (up to the switch interval, 5 ms): fewer calls,
fewer waits.

Faults: when the child ends (killed, crashed) the next message finds its
pipe closed, the proposer says so with
:class:`~warmstart.service.proposer.SearchesLost` (the lease book drops
what it keeps and answers 503; every search is rebuilt from the archive when
its study is used next) and starts a new child at the next message. When
the service process dies, even by ``kill -9``, the child reads the end of
its pipe and exits. Ctrl-C in a terminal reaches the child too: it ignores
SIGINT and is stopped by the service as it shuts down.

:class:`ShardedProposer` spreads the studies over several such children (by
study id), so the proposals of different studies in one batch are drawn at
once; one study's proposals stay in one child, in the order asked.
"""

from __future__ import annotations

import logging
import multiprocessing as mp
import pickle
import signal
import threading
import traceback
from dataclasses import dataclass
from typing import Any, Iterable, NoReturn

from warmstart.errors import WarmstartError
from warmstart.search.strategy import SearchStrategy
from warmstart.service.proposer import (Bundle, Forget, HeldSearch, Message, NoConfigLeft, Proposer, ProposeMany,
                                        SearchesLost, Stop)

__all__ = ["ChildProcessProposer", "ShardedProposer", "SearchFailed", "serve_searches", "START_METHOD",
           "REPLY_TIMEOUT_S"]

log = logging.getLogger("warmstart.service")
START_METHOD = "spawn"  # a fresh interpreter: forking a process with threads (the service's) is unsafe
REPLY_TIMEOUT_S = 300.0  # a proposal takes milliseconds; a child silent this long is taken for hung
STOP_TIMEOUT_S = 10.0
OUTBOX_MAX = 256  # messages without an answer kept at most before they are sent


class SearchFailed(WarmstartError):
    """An error in the search process that could not be sent back as it was
    (its text and traceback instead)."""


@dataclass(frozen=True)
class _Reply:
    value: Any = None
    error: BaseException | None = None


class ChildProcessProposer(Proposer):
    """The searches in a child process (started by :meth:`start`, or by the
    first message after a child was lost).

    Parameters
    ----------
    reply_timeout : float, default 300
        Seconds to wait for a proposal before the child is taken for hung,
        stopped and replaced.
    """

    in_child = True

    def __init__(self, reply_timeout: float = REPLY_TIMEOUT_S):
        self.reply_timeout = float(reply_timeout)
        self._context = mp.get_context(START_METHOD)
        self._process = None
        self._conn = None
        self._lock = threading.Lock()
        self._outbox: list[Message] = []  # sent without an answer, not yet delivered
        self._asked = False  # a ProposeMany sent by ask_many, its answer not read yet
        self._heard = False  # the running child has answered at least once
        #: children started so far (more than one: some were lost and replaced)
        self.started = 0

    @property
    def pid(self) -> int | None:
        """The child's process id (None when none runs)."""
        return None if self._process is None else self._process.pid

    def start(self) -> None:
        """Start the child process (nothing when one runs)."""
        with self._lock:
            self._start()

    def _start(self) -> None:
        if self._process is not None:
            return
        mine, theirs = self._context.Pipe(duplex=True)
        process = self._context.Process(target=serve_searches, args=(theirs,), name="warmstart-searches",
                                        daemon=True)
        process.start()
        theirs.close()  # only the child holds its end: when the child ends, this end reads EOF
        self._process, self._conn = process, mine
        self._heard = False
        self.started += 1

    def close(self) -> None:
        """Stop the child (after the messages sent so far) and join it."""
        with self._lock:
            if self._process is None:
                return
            try:
                self._conn.send(Bundle((*self._outbox, Stop())))
            except OSError:
                pass
            self._outbox.clear()
            self._process.join(STOP_TIMEOUT_S)
            self._end()

    def _end(self) -> int | None:
        """Make sure the child is gone (killed when it is still there) and forget it; its exit code."""
        process, conn = self._process, self._conn
        self._process = self._conn = None
        self._outbox.clear()
        self._asked = False
        if process.is_alive():
            process.kill()
        process.join(STOP_TIMEOUT_S)
        conn.close()
        return process.exitcode

    def ask_many(self, items):
        """Send the proposals now; the function returned reads their answer
        (the child draws them meanwhile)."""
        message = ProposeMany(tuple((int(study), int(k)) for study, k in items))
        with self._lock:
            if self._process is None:
                self._start()
            self._exchange(message, wait=False)
            self._asked = True

        def answer() -> list:
            with self._lock:
                self._asked = False
                reply = self._receive()
            if reply.error is not None:
                raise reply.error
            return reply.value
        return answer

    def sync(self) -> None:
        """Deliver the messages kept so far (raises SearchesLost when the child is gone)."""
        with self._lock:
            if self._outbox:
                self._exchange(None)

    def _send(self, message: Message) -> Any:
        with self._lock:
            if self._process is None:
                if isinstance(message, Forget):
                    return None  # no child: no search held
                self._start()
            if not message.answered:
                self._outbox.append(message)
                if len(self._outbox) >= OUTBOX_MAX:
                    self._exchange(None)
                return None
            reply = self._exchange(message)
        if reply.error is not None:
            raise reply.error
        return reply.value

    def _exchange(self, message: Message | None, wait: bool = True) -> "_Reply | None":
        """Send the kept messages and ``message`` as one bundle; its reply when it
        is answered (``wait`` False: read later by :meth:`_receive`)."""
        if self._asked:
            raise RuntimeError("read the answer of ask_many before asking the searches anything else")
        bundle = Bundle((*self._outbox, *(() if message is None else (message,))))
        self._outbox.clear()
        try:
            self._conn.send(bundle)
        except OSError as exc:
            self._lost(exc)
        if bundle.answered and wait:
            return self._receive()
        return None

    def _receive(self) -> "_Reply":
        try:
            if self._conn is None:
                raise EOFError("no search process")
            if not self._conn.poll(self.reply_timeout):
                raise TimeoutError(f"no answer within {self.reply_timeout:g} s")
            reply = self._conn.recv()
        except (OSError, EOFError) as exc:
            self._lost(exc)
        self._heard = True
        return reply

    def _lost(self, exc: BaseException) -> NoReturn:
        """The child is gone (or hung): end it and say so."""
        why = "no answer" if isinstance(exc, TimeoutError) else f"{type(exc).__name__}"
        heard = self._heard
        code = self._end() if self._process is not None else None
        hint = "" if heard else (
            " before it ever answered; if a script starts the service with search_process=True, it must do so "
            "under `if __name__ == '__main__':` (the spawned process imports the main module; its error, if "
            "any, is on stderr)")
        log.warning("the search process ended (%s, exit code %s)%s; a new one starts with the next "
                    "request, every search rebuilt from the archive", why, code, hint)
        raise SearchesLost(f"the search process ended ({why}, exit code {code}){hint}; the searches are "
                           "rebuilt from the archive: retry the request") from None


class ShardedProposer(Proposer):
    """The searches spread over ``n`` child processes, a study's in child
    ``study_id % n``: a batch's proposals of studies in different children are
    drawn at once. Each study sees the same calls in the same order as with
    one child, so it proposes the same.

    Parameters
    ----------
    n : int
        Child processes (2 or more).
    reply_timeout : float, default 300
        As :class:`ChildProcessProposer`.
    """

    in_child = True

    def __init__(self, n: int, reply_timeout: float = REPLY_TIMEOUT_S):
        if int(n) < 2:
            raise ValueError(f"a sharded proposer needs 2 or more child processes, got {n!r}")
        self.children = [ChildProcessProposer(reply_timeout) for _ in range(int(n))]

    def _child(self, study: int) -> ChildProcessProposer:
        return self.children[int(study) % len(self.children)]

    @property
    def pids(self) -> list[int | None]:
        """Each child's process id (None where none runs)."""
        return [child.pid for child in self.children]

    @property
    def started(self) -> int:
        """Children started so far, over every shard."""
        return sum(child.started for child in self.children)

    def start(self) -> None:
        for child in self.children:
            child.start()

    def close(self) -> None:
        for child in self.children:
            child.close()

    def adopt(self, study: int, search: SearchStrategy, held: Iterable[str] = ()) -> None:
        self._child(study).adopt(study, search, held)

    def release(self, study: int, keys: Iterable[str]) -> None:
        self._child(study).release(study, keys)

    def record(self, study: int, key: str, score: float | None, status: str) -> None:
        self._child(study).record(study, key, score, status)

    def forget(self, study: int | None = None) -> None:
        for child in (self.children if study is None else [self._child(study)]):
            child.forget(study)

    def studies(self) -> list[int]:
        return sorted(study for child in self.children for study in child.studies())

    def sync(self) -> None:
        for child in self.children:
            child.sync()

    def propose_many(self, items: Iterable[tuple[int, int]]) -> list[list[tuple[str, dict]]]:
        return self.ask_many(items)()

    def ask_many(self, items):
        """Each child's share of the proposals, sent to all before any answer is
        read; the function returned reads every answer (all of them, so that each
        child may be asked again) and puts them back in the order asked. When
        some fail, the error of the first item asked that failed is raised."""
        items = [(int(study), int(k)) for study, k in items]
        shares: dict[int, list[int]] = {}  # child -> positions of its items
        for i, (study, _) in enumerate(items):
            shares.setdefault(study % len(self.children), []).append(i)
        asked: dict = {}
        for c, where in shares.items():  # every child asked (a lost one fails later), none read yet
            try:
                asked[c] = self.children[c].ask_many([items[i] for i in where])
            except SearchesLost as exc:
                asked[c] = exc

        def answer() -> list:
            drawn: list = [None] * len(items)
            failed: list[tuple[int, BaseException]] = []
            for c, where in shares.items():
                try:
                    if isinstance(asked[c], BaseException):
                        raise asked[c]
                    got = asked[c]()
                except (NoConfigLeft, SearchesLost) as exc:
                    study = getattr(exc, "study", None)
                    first = next((i for i in where if items[i][0] == study), where[0])
                    failed.append((first, exc))
                    continue
                for i, configs in zip(where, got):
                    drawn[i] = configs
            if failed:
                raise min(failed, key=lambda f: f[0])[1]
            return drawn
        return answer

    def _send(self, message: Message) -> Any:  # pragma: no cover - every message goes to one child above
        raise NotImplementedError("a sharded proposer sends each message to the child of its study")


def _sendable(error: BaseException) -> BaseException:
    """``error`` when it survives pickling, else a :class:`SearchFailed` with its text."""
    try:
        pickle.loads(pickle.dumps(error))
        return error
    except Exception:
        text = "".join(traceback.format_exception(error)).strip()
        return SearchFailed(f"the search failed in the search process: {text}")


def _import_searches() -> None:
    """Load what the service's searches run on while the service starts: else the
    first search sent here (unpickled) loads it, and the first proposal after a
    start waited for that (1.3 s on a 2-core machine, every client with it)."""
    import scipy.stats.qmc  # noqa: F401  (a cold start's space-filling points)

    import warmstart.search.density  # noqa: F401
    import warmstart.search.mixture  # noqa: F401


def serve_searches(conn) -> None:
    """The child process: apply each message received, answer those answered;
    return at :class:`~warmstart.service.proposer.Stop` or at the end of the
    pipe (the service process is gone)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C reaches the whole group; the service stops us
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")  # as in the service: small products, one thread (core.py)
    _import_searches()
    held: dict[int, HeldSearch] = {}
    while True:
        try:
            bundle = conn.recv()
        except (EOFError, OSError):
            return
        for message in bundle.messages:
            if isinstance(message, Stop):
                return
            try:
                reply = _Reply(message.apply(held))
            except Exception as exc:
                reply = _Reply(error=_sendable(exc))
                if not message.answered:  # nobody waits to be told: the study's next proposal says it is lost
                    held.pop(getattr(message, "study", None), None)
                    log.warning("search process: %s failed (%s: %s); the study's search is dropped",
                                type(message).__name__, type(exc).__name__, exc)
            if message.answered:
                try:
                    conn.send(reply)
                except OSError:
                    return
