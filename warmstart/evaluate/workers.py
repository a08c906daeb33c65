"""Run independent jobs in local worker processes (or on a given executor), in order, with progress."""

from __future__ import annotations

import concurrent.futures as cf
from typing import Any, Callable, Sequence

__all__ = ["map_jobs", "wait_first"]

#: longest single wait on futures: Ctrl-C may reach another thread of this process (the pool's
#: own threads), and Python raises KeyboardInterrupt only when the main thread next runs
_TICK_S = 0.2


def wait_first(futures) -> set:
    """The futures of ``futures`` that are done, waiting until at least one is.

    ``concurrent.futures.wait(..., FIRST_COMPLETED)`` in slices of at most
    0.2 s, so a Ctrl-C that reached another thread is raised within a
    fraction of a second rather than when a job ends.
    """
    while True:
        finished, _ = cf.wait(futures, timeout=_TICK_S, return_when=cf.FIRST_COMPLETED)
        if finished or not futures:
            return finished


def map_jobs(
    fn: Callable[[Any], Any],
    jobs: Sequence[Any],
    workers: int = 1,
    progress: Callable[[int, int], None] | None = None,
    done_before: int = 0,
    total: int | None = None,
    executor: cf.Executor | None = None,
) -> list:
    """``[fn(job) for job in jobs]``, in worker processes when ``workers > 1``.

    Parameters
    ----------
    fn : callable
        A module-level function (picklable).
    jobs : sequence
        One argument per call.
    workers : int, default 1
        Processes; 1 runs in this process.
    progress : callable(done, total), optional
        Called after each finished job, and once before the first starts
        (with ``done_before``), so a long first job shows its bar at once.
    done_before, total : int
        Offsets for the progress count when these jobs are part of larger work.
    executor : concurrent.futures.Executor, optional
        Run every job there instead (a Dask cluster's
        :class:`~warmstart.evaluate.cluster.ClusterPool`); ``workers`` is then
        not used. The caller shuts it down.

    Returns
    -------
    list
        Results in the order of ``jobs``.
    """
    total = len(jobs) + done_before if total is None else total
    results: list = [None] * len(jobs)
    done = done_before
    if progress and jobs:
        progress(done, total)
    if executor is not None and jobs:
        futures = {executor.submit(fn, job): i for i, job in enumerate(jobs)}
        try:
            _collect(futures, results, done, total, progress)
        except BaseException:  # Ctrl-C or a failed job: drop what has not started
            for fut in futures:
                fut.cancel()
            raise
        return results
    if workers > 1 and len(jobs) > 1:
        with cf.ProcessPoolExecutor(max_workers=workers) as pool:
            futures = {pool.submit(fn, job): i for i, job in enumerate(jobs)}
            _collect(futures, results, done, total, progress)
        return results
    for i, job in enumerate(jobs):
        results[i] = fn(job)
        done += 1
        if progress:
            progress(done, total)
    return results


def _collect(futures: dict, results: list, done: int, total: int,
             progress: Callable[[int, int], None] | None) -> None:
    """Put each future's result at its job's index as it finishes."""
    pending = set(futures)
    while pending:
        for fut in wait_first(pending):
            pending.discard(fut)
            results[futures[fut]] = fut.result()
            done += 1
            if progress:
                progress(done, total)
