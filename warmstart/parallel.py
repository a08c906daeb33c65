"""Run independent jobs in local worker processes, in order, with progress."""

from __future__ import annotations

import concurrent.futures as cf
from typing import Any, Callable, Sequence

__all__ = ["map_jobs"]


def map_jobs(
    fn: Callable[[Any], Any],
    jobs: Sequence[Any],
    workers: int = 1,
    progress: Callable[[int, int], None] | None = None,
    done_before: int = 0,
    total: int | None = None,
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
        Called after each finished job.
    done_before, total : int
        Offsets for the progress count when these jobs are part of larger work.

    Returns
    -------
    list
        Results in the order of ``jobs``.
    """
    total = len(jobs) + done_before if total is None else total
    results: list = [None] * len(jobs)
    done = done_before
    if workers > 1 and len(jobs) > 1:
        with cf.ProcessPoolExecutor(max_workers=workers) as pool:
            futures = {pool.submit(fn, job): i for i, job in enumerate(jobs)}
            for fut in cf.as_completed(futures):
                results[futures[fut]] = fut.result()
                done += 1
                if progress:
                    progress(done, total)
        return results
    for i, job in enumerate(jobs):
        results[i] = fn(job)
        done += 1
        if progress:
            progress(done, total)
    return results
