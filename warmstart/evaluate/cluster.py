"""Evaluate trials and replay tasks on a Dask cluster, through a ``concurrent.futures`` executor.

:class:`ClusterPool` connects to a running Dask scheduler and submits work
as the local process pools do, so the search loop
(:func:`~warmstart.search.strategy.run_search`) and
:func:`~warmstart.evaluate.workers.map_jobs` run unchanged on it. Objects
every task needs (an objective and its data) are *shared*: sent once to
every worker (Dask's ``scatter(..., broadcast=True)``) and passed to tasks
by reference, so a worker keeps one copy, and with it the trial process of
a time limit, for the whole search (see :mod:`warmstart.evaluate.deadline`:
on workers that Dask's nanny starts, which are daemonic, that process is
started with :mod:`subprocess`).

Dask is imported only here, and only when a pool is made (the ``cluster``
extra: ``pip install 'warmstart[cluster]'``).
"""

from __future__ import annotations

import concurrent.futures as cf
from typing import Any, Callable

from warmstart.errors import WarmstartError

__all__ = ["ClusterError", "ClusterPool"]


class ClusterError(WarmstartError):
    """Dask is not installed, or the scheduler cannot be reached or has no workers."""


class ClusterPool(cf.Executor):
    """An executor whose work runs on the workers of a Dask scheduler.

    Parameters
    ----------
    address : str
        The scheduler's address, e.g. ``tcp://10.0.0.5:8786``.
    timeout : float, optional
        Seconds to wait for the connection; default Dask's setting
        ``distributed.comm.timeouts.connect`` (30 s unless configured).

    Attributes
    ----------
    cores : int
        Threads over all workers when connected (at least 1): how many tasks
        run at once.

    Notes
    -----
    Tasks are submitted as impure (every call runs, none is taken from a
    cache). Close it (or use it as a context manager) to disconnect: shared
    objects are then released by the workers.
    """

    def __init__(self, address: str, timeout: float | None = None):
        if not isinstance(address, str) or not address.strip():
            raise ClusterError(f"a cluster address must be a scheduler address such as "
                               f"tcp://127.0.0.1:8786, got {address!r}")
        try:
            from dask.distributed import Client
        except ImportError:
            raise ClusterError("--cluster needs dask.distributed, which is not installed; "
                               "install it with: pip install 'warmstart[cluster]'") from None
        try:
            self.client = Client(address, **({} if timeout is None else {"timeout": timeout}))
        except Exception as exc:  # connection problems come in many types
            raise ClusterError(f"--cluster {address}: cannot connect to the Dask scheduler ({exc})") from None
        self.address = address
        self._executor = self.client.get_executor(pure=False)
        self._shared: dict[int, tuple[Any, Any]] = {}
        threads = self.client.nthreads()
        if not threads:
            self.client.close()
            raise ClusterError(f"--cluster {address}: the scheduler has no workers; start some with "
                               f"`dask worker {address}`")
        self.cores = max(1, sum(threads.values()))

    def share(self, obj: Any) -> Any:
        """Send ``obj`` to every worker once; later :meth:`submit` calls pass it by reference.

        Returns ``obj``: submit it as usual.
        """
        if id(obj) not in self._shared:
            future = self.client.scatter(obj, broadcast=True, hash=False)
            self._shared[id(obj)] = (obj, future)  # keep obj alive so its id stays its own
        return obj

    def submit(self, fn: Callable, /, *args: Any, **kwargs: Any) -> cf.Future:
        """``fn(*args, **kwargs)`` on a worker; shared arguments go by reference."""
        args = tuple(self._shared[id(a)][1] if id(a) in self._shared else a for a in args)
        return self._executor.submit(fn, *args, **kwargs)

    def shutdown(self, wait: bool = True, *, cancel_futures: bool = False) -> None:
        """Wait for (or cancel) submitted work, release shared objects and disconnect."""
        try:
            self._executor.shutdown(wait=wait and not cancel_futures)
        finally:
            self._shared.clear()
            self.client.close()
