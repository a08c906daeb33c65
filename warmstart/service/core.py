"""The state one service process holds: the archive (opened for writing,
owned by this process), its one writer, a read-only view per thread, the
leases, the tokens and the background jobs.
"""

from __future__ import annotations

import logging
import math
import threading
from typing import Any, Callable

import numpy as np
import pandas as pd

from warmstart.archive.store import Archive
from warmstart.service.auth import Tokens
from warmstart.service.jobs import GainJobs
from warmstart.service.leases import DEFAULT_LEASE_SECONDS, LeaseBook
from warmstart.service.proposer import InProcessProposer, SearchesLost
from warmstart.service.writer import Answer, RequestKey, Writer

log = logging.getLogger("warmstart.service")

__all__ = ["Service", "jsonable"]


def jsonable(value: Any) -> Any:
    """Plain JSON value for numpy/pandas scalars, timestamps and containers
    (non-finite floats and missing values become null)."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if value is None or value is pd.NaT:
        return None
    if hasattr(value, "isoformat"):
        return value.isoformat()
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return value


class Service:
    """One archive served: the writer, the readers, leases, tokens, jobs.

    Parameters
    ----------
    archive : Archive
        Opened for writing (this process owns the file from now on).
    tokens : Tokens, optional
        The team's tokens; None lets every request in as an anonymous admin.
    lease_seconds : float, default 3600
        Life of a lease when a proposal asks for none.
    search_process : bool or int, default False
        Keep the studies' searches in a child process of their own
        (:mod:`warmstart.service.search_process`), so their computation runs
        on another core than HTTP and the archive's writes; a number of 2 or
        more spreads the studies over that many children (a batch's
        proposals of different studies drawn at once); False keeps them in
        this process (no process to start: what in-process tests want).
    """

    def __init__(self, archive: Archive, tokens: Tokens | None = None,
                 lease_seconds: float = DEFAULT_LEASE_SECONDS, search_process: bool | int = False):
        if archive.read_only:
            raise ValueError("the service needs the archive opened for writing")
        self.archive = archive
        self.tokens = tokens
        #: the queries module caches profile indexes in one process-wide table; its
        #: users (neighbors, defaults, priors, warm starts) take turns through this lock
        self.query_lock = threading.Lock()
        if int(search_process) > 1:
            from warmstart.service.search_process import ShardedProposer

            searches = ShardedProposer(int(search_process))
        elif search_process:
            from warmstart.service.search_process import ChildProcessProposer

            searches = ChildProcessProposer()
        else:
            searches = InProcessProposer()
        self.leases = LeaseBook(lease_seconds, query_lock=self.query_lock, searches=searches)
        self.writer = Writer(archive, on_commit=self.leases.committed, on_failure=self.leases.abort,
                             before_commit=self.leases.flush)
        self.jobs = GainJobs(self)
        self._local = threading.local()
        #: views are made from this one (under the lock), never from the writer's connection
        #: while the writer uses it
        self._root = archive.reader()
        self._views: list[Archive] = [self._root]
        self._views_lock = threading.Lock()
        self._query_view: Archive | None = None
        self._blas = None  # the BLAS thread limit while the service runs
        self.started = False

    # -- lifecycle -------------------------------------------------------------
    def start(self) -> None:
        """Start the writer (and clear stored answers past their retention) and
        the search process, if the searches run in one.

        While the service runs, BLAS uses one thread: its numerical work is
        many small matrix products, and BLAS threads that spin for cores the
        event loop and the clients need made a product of 256 x 40 by 40 x 200
        (the ranking weights of a warm search) 36 times slower on 2 busy
        cores (4.3 ms against 0.12 ms, measured).
        """
        if not self.started:
            from threadpoolctl import threadpool_limits

            self._blas = threadpool_limits(limits=1, user_api="blas")
            self.leases.searches.start()  # the child imports while the writer starts
            self.writer.start()
            try:  # ready before the first request: else the first proposal waited for the child's start
                self.leases.searches.studies()
            except SearchesLost as exc:  # the next message to the searches starts another child
                log.warning("the search process did not start: %s", exc)
            self.started = True

    def new_view(self) -> Archive:
        """A read-only view for a thread of its own (e.g. a background job); close it after use."""
        with self._views_lock:
            return self._root.reader()

    def close(self) -> None:
        """Finish queued writes, stop jobs and the search process, close every
        view and the archive."""
        self.jobs.close()
        self.writer.close()
        self.leases.close()
        with self._views_lock:
            for view in self._views:
                view.close()
            self._views.clear()
        self.archive.close()
        if self._blas is not None:
            self._blas.restore_original_limits()
            self._blas = None

    # -- reads -----------------------------------------------------------------
    def reader(self) -> Archive:
        """This thread's read-only view of the archive (a cursor of its own)."""
        view = getattr(self._local, "view", None)
        if view is None:
            with self._views_lock:
                view = self._root.reader()
                self._views.append(view)
            self._local.view = view
        return view

    def query(self, fn: Callable[[Archive], Any]) -> Any:
        """Run a neighbors/defaults/prior computation on the shared query view."""
        with self.query_lock:
            if self._query_view is None:
                with self._views_lock:
                    self._query_view = self._root.reader()
                    self._views.append(self._query_view)
            return fn(self._query_view)

    # -- writes ----------------------------------------------------------------
    async def write(self, fn: Callable[[Archive], tuple[int, Any]], key: RequestKey | None = None,
                    early: bool = False) -> Answer:
        """Run ``fn`` in the writer thread, in one transaction; the answer
        comes back after the commit (``early``: a result, run before the
        proposals committed with it)."""
        return await self.writer.submit_async(fn, key, early=early)
