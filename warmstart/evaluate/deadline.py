"""Run a job in a child process that is stopped when its time limit passes.

The cross-validated objective uses this for trials with a time limit: a fit
inside scikit-learn cannot be interrupted from Python, but a process can be
ended. :class:`StoppableRunner` keeps a child process per concurrent caller;
each child receives the job (and the data inside it) once, when it starts,
and then evaluates one payload at a time, reporting its progress (the stage
it is in, e.g. the CV fold) as it goes. When a run passes its limit the
child is terminated (killed if it does not exit), joined, and the next run
starts a fresh one.

Children come from a *fork server* that has imported scikit-learn (``spawn``
on platforms without one): the caller may hold DuckDB's threads and may
have run OpenMP code, and forking such a process can hang the child. A
child ignores Ctrl-C (the caller handles it and stops the child) and exits
on its own when the caller's process ends.

A daemonic process may not start ``multiprocessing`` children. Dask's nanny
starts its worker processes as daemonic, and ``multiprocessing.Pool``
workers are daemonic too; there the child is a fresh interpreter started
with :mod:`subprocess` (which a daemonic process may start), given this
process's ``sys.path`` as ``spawn`` does, and talking over the same kind of
pipes, inherited by descriptor. Such a child costs an interpreter start and
the imports of the job, paid once per child, not per run. POSIX only.
"""

from __future__ import annotations

import importlib
import json
import multiprocessing
import multiprocessing.connection as mpc
from multiprocessing.reduction import ForkingPickler
import os
import signal
import subprocess
import sys
import threading
import time
import weakref
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Callable

from warmstart.evaluate.result import error_text

__all__ = ["RunOutcome", "StoppableRunner", "child_context"]

#: seconds a new child may take to start (import, receive the job) before the run fails
START_TIMEOUT_S = 120.0
#: seconds a terminated child gets to exit before it is killed
STOP_WAIT_S = 2.0
#: longest single wait on a child: Ctrl-C may reach another thread of this process, and Python
#: runs its handler (KeyboardInterrupt) only when the main thread next runs Python code
_TICK_S = 0.2


def _wait(objects: list, timeout: float) -> list:
    """``multiprocessing.connection.wait`` in slices of at most ``_TICK_S``, so a
    pending Ctrl-C is raised within a fraction of a second."""
    deadline = time.perf_counter() + timeout
    while True:
        remaining = deadline - time.perf_counter()
        ready = mpc.wait(objects, max(0.0, min(remaining, _TICK_S)))
        if ready or remaining <= _TICK_S:
            return ready


# imported once by the fork server, so children start without importing them
_PRELOAD = ["warmstart.evaluate.learners", "sklearn.ensemble", "sklearn.svm", "sklearn.neighbors",
            "sklearn.linear_model", "sklearn.neural_network", "sklearn.pipeline", "sklearn.compose",
            "sklearn.metrics"]


def child_context() -> multiprocessing.context.BaseContext:
    """The multiprocessing context for worker and trial processes.

    ``forkserver`` (whose server has imported scikit-learn, so starts are
    fast and no process that ran OpenMP or holds threads is forked), or
    ``spawn`` on platforms without it.
    """
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(_PRELOAD)
        return context
    return multiprocessing.get_context("spawn")  # pragma: no cover - platforms without fork


@dataclass(frozen=True)
class RunOutcome:
    """How one run in a child process ended.

    Attributes
    ----------
    status : {"done", "error", "timeout", "ended"}
        ``done``: the job returned ``value``; ``error``: it raised (``error``
        holds the exception's type and text); ``timeout``: the limit passed
        and the child was stopped; ``ended``: the child could not start or
        died during the run (``error`` says how).
    value : object
        What the job returned (``done`` only).
    error : str or None
        What went wrong.
    stage : object
        The last stage the job reported before the run ended (None if none).
    started : float
        ``time.perf_counter()`` when the payload was sent (the limit runs from
        here; starting a child is not counted).
    started_at : datetime
        The same moment in UTC.
    """

    status: str
    value: Any = None
    error: str | None = None
    stage: Any = None
    started: float = 0.0
    started_at: datetime | None = None


def _exit_when_orphaned(alive: mpc.Connection) -> None:
    """Child thread: end the process when the caller's end of ``alive`` closes."""
    try:
        alive.recv()
    except (EOFError, OSError):
        pass
    os._exit(1)


def serve_inherited(conn_fd: int, alive_fd: int) -> None:
    """Child main of a child started with :mod:`subprocess` (see :class:`_CommandProcess`).

    ``conn_fd`` and ``alive_fd`` are the child's ends of the pipes, inherited
    by descriptor; the job is the first message on ``conn_fd``.
    """
    conn = mpc.Connection(conn_fd)
    alive = mpc.Connection(alive_fd, writable=False)
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # before the job's imports, which may take a while
    try:
        job = conn.recv()
    except (EOFError, OSError):
        return
    for name in _PRELOAD + ["threadpoolctl"]:  # as the fork server does: imports are not paid inside a limit
        try:
            importlib.import_module(name)
        except ImportError:
            pass
    _serve(job, conn, alive)


#: what the interpreter of a :class:`_CommandProcess` runs: this process's sys.path, then the loop
_BOOTSTRAP = ("import sys, json; sys.path[:] = json.loads(sys.argv[1]); "
              "from warmstart.evaluate.deadline import serve_inherited; "
              "serve_inherited(int(sys.argv[2]), int(sys.argv[3]))")


class _CommandProcess:
    """A child interpreter started with :mod:`subprocess`, with the parts of
    ``multiprocessing.Process`` that :class:`_Child` uses (``sentinel``,
    ``is_alive``, ``terminate``, ``kill``, ``join``, ``exitcode``).

    The sentinel is the read end of a pipe whose only write end the child
    holds and never writes: it reads as end-of-file once the child has ended,
    as ``multiprocessing``'s own sentinels do on POSIX.
    """

    def __init__(self, conn_fd: int, alive_fd: int):
        sentinel_r, sentinel_w = os.pipe()
        try:
            self.popen = subprocess.Popen(
                [sys.executable, "-c", _BOOTSTRAP, json.dumps(sys.path), str(conn_fd), str(alive_fd)],
                pass_fds=(conn_fd, alive_fd, sentinel_w), stdin=subprocess.DEVNULL,
            )
        except BaseException:
            os.close(sentinel_r)
            raise
        finally:
            os.close(sentinel_w)
        self.sentinel = sentinel_r
        self._finalizer = weakref.finalize(self, os.close, sentinel_r)

    @property
    def exitcode(self) -> int | None:
        return self.popen.poll()  # negative for a signal, as multiprocessing's exitcode

    def is_alive(self) -> bool:
        return self.popen.poll() is None

    def terminate(self) -> None:
        self.popen.terminate()

    def kill(self) -> None:
        self.popen.kill()

    def join(self, timeout: float | None = None) -> None:
        try:
            self.popen.wait(timeout)
        except subprocess.TimeoutExpired:
            pass

    def close(self) -> None:
        """Close the sentinel (once the child has been joined)."""
        self._finalizer()


def _serve(job: Callable, conn: mpc.Connection, alive: mpc.Connection) -> None:
    """Child main loop: evaluate payloads until the caller closes the pipe."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the caller handles Ctrl-C and stops this process
    threading.Thread(target=_exit_when_orphaned, args=(alive,), daemon=True).start()
    conn.send(("ready", None))

    def report(stage: Any) -> None:
        conn.send(("stage", stage))

    while True:
        try:
            payload = conn.recv()
        except (EOFError, OSError):
            return
        try:
            value = job(payload, report)
        except Exception as exc:  # the caller records it as a failed run
            conn.send(("error", error_text(exc)))
        else:
            conn.send(("done", value))


def _exit_text(exitcode: int | None) -> str:
    if exitcode is None:
        return "it did not answer"
    if exitcode < 0:
        try:
            return f"it was ended by signal {signal.Signals(-exitcode).name}"
        except ValueError:
            return f"it was ended by signal {-exitcode}"
    return f"it exited with status {exitcode}"


class _Child:
    """One child process serving a job, with the caller's ends of its pipes."""

    def __init__(self, context: multiprocessing.context.BaseContext, job: Callable, command: bool = False):
        self.conn, child_conn = context.Pipe()
        alive_r, self.alive = context.Pipe(duplex=False)
        self.command = command
        self.owner = os.getpid()
        try:
            if command:  # a daemonic process: a fresh interpreter, sent the job first
                message = ForkingPickler.dumps(job)  # before starting: a job that cannot be pickled starts nothing
                self.proc = _CommandProcess(child_conn.fileno(), alive_r.fileno())
                self.conn.send_bytes(message)
            else:
                self.proc = context.Process(target=_serve, args=(job, child_conn, alive_r),
                                            name="warmstart-trial", daemon=True)
                self.proc.start()
        except BaseException:
            if command and hasattr(self, "proc"):
                self.proc.kill()
                self.proc.join()
            self.conn.close()
            self.alive.close()
            raise
        finally:  # only the child keeps these ends, so its death reads as EOF here
            child_conn.close()
            alive_r.close()

    def wait_ready(self, timeout: float) -> str | None:
        """None once the child is ready; otherwise why it is not (and it is stopped)."""
        ready = _wait([self.conn, self.proc.sentinel], timeout)
        if self.conn in ready:
            try:
                kind, _ = self.conn.recv()
                if kind == "ready":
                    return None
            except (EOFError, OSError):
                pass
        self.proc.join(STOP_WAIT_S if ready else 0)
        if not ready:
            why = f"it was not ready after {timeout:g} s"
        elif self.command:
            why = (f"{_exit_text(self.proc.exitcode)}; its error output went to this process's "
                   "error output (on a Dask worker, the worker's log)")
        else:  # most often a script without the main guard, whose child re-ran the script
            why = (f"{_exit_text(self.proc.exitcode)}; its error output is above (a script that "
                   "evaluates trials with a time limit must do so under `if __name__ == \"__main__\":`, "
                   "as any program using multiprocessing)")
        self.stop()
        return f"the trial process could not start: {why}"

    def stop(self) -> None:
        """Terminate (then kill) the child, join it and close the pipes."""
        if self.owner == os.getpid() and self.proc.is_alive():
            self.proc.terminate()
            self.proc.join(STOP_WAIT_S)
            if self.proc.is_alive():
                self.proc.kill()
                self.proc.join()
        elif self.owner == os.getpid():
            self.proc.join()
        if self.command and self.owner == os.getpid():
            self.proc.close()
        self.conn.close()
        self.alive.close()


def _stop_all(children: list) -> None:
    while children:
        children.pop().stop()


class StoppableRunner:
    """Evaluate ``job(payload, report)`` in child processes, each run under a time limit.

    Parameters
    ----------
    job : callable
        Picklable (a module-level function, or a method of a picklable
        object). Called in the child as ``job(payload, report)``; it may call
        ``report(stage)`` with any small picklable value to say where it is,
        and returns a picklable value.
    context : multiprocessing context, optional
        Default :func:`child_context`.
    command : bool, optional
        Start children with :mod:`subprocess` (a fresh interpreter given this
        process's ``sys.path``) instead of ``context``. Default: only in a
        daemonic process, which may not start ``multiprocessing`` children.

    Notes
    -----
    The job is sent to a child once, when the child starts. Idle children
    are kept for the next run, one per concurrent caller (threads may share
    a runner). A run that times out, or whose child dies, costs the child:
    the next run starts a new one. :meth:`close` stops the idle children;
    it also runs when the runner is garbage-collected and at exit.

    In a daemonic process (a worker that Dask's nanny started, a
    ``multiprocessing.Pool`` worker) children are started with
    :mod:`subprocess`; the job must then be importable by reference from
    this process's ``sys.path`` (a module-level function or a method of an
    object of a module-level class), not only from a ``__main__`` script.
    """

    def __init__(self, job: Callable, context: multiprocessing.context.BaseContext | None = None,
                 command: bool | None = None):
        if command is not None and not isinstance(command, bool):
            raise TypeError(f"command must be True, False or None (decide by the process), got {command!r}")
        if command and os.name != "posix":  # pragma: no cover - not POSIX
            raise ValueError("children started with subprocess (command=True) need POSIX descriptor passing")
        self.job = job
        self.context = context or child_context()
        self.command = command
        self._idle: list[_Child] = []
        self._lock = threading.Lock()
        self._finalizer = weakref.finalize(self, _stop_all, self._idle)

    def _take(self) -> _Child | str:
        with self._lock:
            while self._idle:
                child = self._idle.pop()
                if child.owner == os.getpid() and child.proc.is_alive():
                    return child
                child.stop()
        command = self.command
        if command is None:
            command = bool(multiprocessing.current_process().daemon)
        if command and os.name != "posix":  # pragma: no cover - not POSIX
            return ("a time limit needs a child process, and this process is daemonic (a Dask or "
                    "multiprocessing.Pool worker), which on this platform cannot start one; run trials "
                    "in non-daemonic workers (Dask: `dask worker --no-nanny`) or without a time limit")
        try:
            child = _Child(self.context, self.job, command=command)
        except Exception as exc:  # e.g. a job that cannot be pickled
            return f"the trial process could not start: {error_text(exc)}"
        try:
            why = child.wait_ready(START_TIMEOUT_S)
        except BaseException:  # Ctrl-C while it starts
            child.stop()
            raise
        return child if why is None else why

    def run(self, payload: Any, limit: float) -> RunOutcome:
        """Evaluate ``payload`` in a child; stop the child if ``limit`` seconds pass.

        Parameters
        ----------
        payload : object
            Picklable argument of the job.
        limit : float
            Seconds from sending the payload.

        Returns
        -------
        RunOutcome
            The job's value or error, or ``timeout`` / ``ended`` with the last
            reported stage. Ctrl-C (``KeyboardInterrupt``) and ``SystemExit``
            stop the child and pass through.
        """
        child = self._take()
        started_at, started = datetime.now(timezone.utc), time.perf_counter()
        if isinstance(child, str):
            return RunOutcome("ended", error=child, started=started, started_at=started_at)
        stage = None
        done = False
        try:
            child.conn.send(payload)
            deadline = started + limit
            while True:
                remaining = deadline - time.perf_counter()
                if remaining <= 0:
                    return RunOutcome("timeout", stage=stage, started=started, started_at=started_at)
                ready = mpc.wait([child.conn, child.proc.sentinel], min(remaining, _TICK_S))
                if not ready:
                    continue
                if child.conn in ready:  # messages first: the child may have answered, then ended
                    try:
                        kind, value = child.conn.recv()
                    except (EOFError, OSError):
                        kind, value = "ended", None
                    if kind == "stage":
                        stage = value
                        continue
                    if kind in ("done", "error"):
                        done = True
                        if kind == "done":
                            return RunOutcome("done", value=value, stage=stage, started=started,
                                              started_at=started_at)
                        return RunOutcome("error", error=value, stage=stage, started=started,
                                          started_at=started_at)
                if ready:
                    child.proc.join(STOP_WAIT_S)
                    return RunOutcome("ended", error=f"the trial process ended unexpectedly: "
                                      f"{_exit_text(child.proc.exitcode)}", stage=stage,
                                      started=started, started_at=started_at)
        finally:
            if done:
                with self._lock:
                    self._idle.append(child)
            else:  # timeout, death, Ctrl-C, SystemExit: never leave the child running
                child.stop()

    def close(self) -> None:
        """Stop the idle children (running ones are stopped by their run)."""
        with self._lock:
            _stop_all(self._idle)

    def __getstate__(self):
        raise TypeError("a StoppableRunner holds processes and cannot be pickled; pickle its job instead")
