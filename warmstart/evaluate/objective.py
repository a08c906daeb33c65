"""Objectives: turn a config into a trial result.

An objective is any callable ``config -> TrialResult``
(:class:`~warmstart.evaluate.result.TrialResult`; a bare score works too).
This module has the two external objectives:

:class:`CommandObjective`
    runs a command once per config, without a shell. The config goes in as
    JSON on stdin *and* as ``--name value`` arguments; the score comes back
    on standard output, either as a JSON object line ``{"score": 0.93}`` or
    as a bare number on the last non-empty line.
:class:`CallableObjective`
    wraps a Python function that returns a number or a dict with ``score``.

The cross-validated objective of the built-in learners lives in
:mod:`warmstart.evaluate.learners`. Every objective turns a failure (an exception, a
non-zero exit, no score, a timeout, a non-finite score) into a *failed*
trial with the error text, so a search goes on after a bad config.
Only ``KeyboardInterrupt`` and ``SystemExit`` pass through.
"""

from __future__ import annotations

import concurrent.futures as cf
import json
import math
import os
import shlex
import shutil
import signal
import subprocess
import time
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

from warmstart.evaluate.deadline import STOP_WAIT_S, child_context
from warmstart.evaluate.result import ObjectiveError, TrialResult, check_time_limit, error_text, utc_now

__all__ = [
    "ObjectiveError",
    "TrialResult",
    "CallableObjective",
    "CommandObjective",
    "local_pool",
    "parse_score",
    "stop_pool",
]

_TAIL_CHARS = 2000


def _finite_score(value: Any, source: str) -> float:
    """Return ``value`` as a finite float or raise ObjectiveError naming the source."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ObjectiveError(f"{source} gave score {value!r}; a score must be a number")
    value = float(value)
    if not math.isfinite(value):
        raise ObjectiveError(f"{source} gave a non-finite score ({value}); a score must be finite")
    return value


class CallableObjective:
    """Wrap a Python function ``fn(config) -> float | dict`` as an objective.

    Parameters
    ----------
    fn : callable
        Called with the config dict. Returns a number (the score), or a dict
        with a ``"score"`` key (other keys are ignored). Raising an exception
        makes the trial failed, with the exception's text as error.
    time_limit : float, optional
        Seconds. A call that returns after this limit is recorded as failed
        (the call itself is not interrupted; see DEVELOPERS.md).

    Examples
    --------
    >>> objective = CallableObjective(lambda c: -(c["x"] - 1.0) ** 2)
    >>> objective({"x": 1.0}).score
    -0.0
    """

    def __init__(self, fn: Callable[[dict], Any], time_limit: float | None = None):
        if not callable(fn):
            raise ObjectiveError(f"CallableObjective needs a callable, got {type(fn).__name__}")
        self.fn = fn
        self.time_limit = check_time_limit(time_limit)

    def __call__(self, config: Mapping) -> TrialResult:
        started_at, started = utc_now(), time.perf_counter()
        try:
            out = self.fn(dict(config))
            if isinstance(out, Mapping):
                if "score" not in out:
                    raise ObjectiveError(
                        f"objective returned a dict without 'score' (keys {sorted(out)}); "
                        "return a number or {'score': number}"
                    )
                out = out["score"]
            score = _finite_score(out, "objective")
        except Exception as exc:  # a failed trial; the search goes on
            return TrialResult.failed(error_text(exc), started, started_at)
        cost = time.perf_counter() - started
        if self.time_limit is not None and cost > self.time_limit:
            return TrialResult.failed(
                f"trial exceeded its time limit of {self.time_limit:g} s (took {cost:.1f} s)",
                started,
                started_at,
            )
        return TrialResult(score, "ok", cost, None, started_at, utc_now())


def _arg_value(value: Any) -> str:
    """Text of a config value on a command line (JSON spelling for non-strings)."""
    if isinstance(value, str):
        return value
    if isinstance(value, float):
        return repr(value)
    return json.dumps(value)


def parse_score(stdout: str) -> float:
    """Read the score from a command's standard output.

    The last line that is a JSON object with a ``"score"`` key wins; when
    there is none, the last non-empty line must be a number.

    Raises
    ------
    ObjectiveError
        When no score can be found, quoting the last line.
    """
    lines = [line.strip() for line in stdout.splitlines() if line.strip()]
    for line in reversed(lines):
        if line.startswith("{") and line.endswith("}"):
            try:
                obj = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(obj, dict) and "score" in obj:
                return _finite_score(obj["score"], "command output line " + repr(line[:200]))
    if not lines:
        raise ObjectiveError(
            "command printed nothing on standard output; print the score as the last line "
            'or a JSON line like {"score": 0.93}'
        )
    last = lines[-1]
    try:
        value = float(last)
    except ValueError:
        raise ObjectiveError(
            f"no score in the command's output: the last line was {last[:200]!r}; print the "
            'score as the last line or a JSON line like {"score": 0.93}'
        ) from None
    return _finite_score(value, "command output")


def _tail(text: str) -> str:
    text = text.strip()
    return text if len(text) <= _TAIL_CHARS else "..." + text[-_TAIL_CHARS:]


class CommandObjective:
    """Run an external command once per config (no shell).

    Parameters
    ----------
    argv : sequence of str or str
        The command and its fixed arguments. A string is split with
        :func:`shlex.split`; it is never passed to a shell.
    timeout : float, optional
        Seconds. A run over the limit is killed (with its process group on
        POSIX) and recorded as a failed trial.
    cwd : str or Path, optional
        Working directory of the command.
    env : mapping, optional
        Extra environment variables, added to the current environment.

    Notes
    -----
    For config ``{"C": 0.5, "kernel": "rbf"}`` and ``argv = ["python",
    "train.py"]`` the command line is ``python train.py --C 0.5 --kernel
    rbf`` (strings as they are, other values in JSON spelling: ``true``,
    ``3``, ``0.001``) and standard input holds ``{"C":0.5,"kernel":"rbf"}``.
    See :func:`parse_score` for how the score is read. A non-zero exit
    status, a missing score or a timeout gives a failed trial whose error
    holds the tail of standard error.
    """

    def __init__(
        self,
        argv: Sequence[str] | str,
        timeout: float | None = None,
        cwd: str | Path | None = None,
        env: Mapping[str, str] | None = None,
    ):
        if isinstance(argv, str):
            try:
                argv = shlex.split(argv)
            except ValueError as exc:
                raise ObjectiveError(f"cannot split command {argv!r}: {exc}") from None
        argv = [str(a) for a in argv]
        if not argv:
            raise ObjectiveError("the command is empty; give a program and its arguments")
        program = argv[0]
        base = Path(cwd) if cwd is not None else Path.cwd()
        if shutil.which(program) is None and not (base / program).is_file():
            raise ObjectiveError(
                f"command {program!r} not found on PATH or as a file; give the program's full path"
            )
        self.argv = argv
        self.timeout = check_time_limit(timeout)
        self.cwd = str(cwd) if cwd is not None else None
        self.env = dict(env) if env else None

    def command_line(self, config: Mapping) -> list[str]:
        """The argument list used for ``config``."""
        args = list(self.argv)
        for name, value in config.items():
            args += [f"--{name}", _arg_value(value)]
        return args

    def __call__(self, config: Mapping) -> TrialResult:
        started_at, started = utc_now(), time.perf_counter()
        payload = json.dumps(dict(config), sort_keys=True, separators=(",", ":")) + "\n"
        env = {**os.environ, **self.env} if self.env else None
        try:
            proc = subprocess.Popen(
                self.command_line(config),
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                text=True,
                cwd=self.cwd,
                env=env,
                start_new_session=os.name == "posix",
            )
        except OSError as exc:
            return TrialResult.failed(f"cannot start command {self.argv[0]!r}: {exc}", started, started_at)
        try:
            out, err = proc.communicate(payload, timeout=self.timeout)
        except subprocess.TimeoutExpired:
            _kill(proc)
            out, err = proc.communicate()
            msg = f"command exceeded its time limit of {self.timeout:g} s and was killed"
            tail = _tail(err)
            return TrialResult.failed(msg + (f"; stderr: {tail}" if tail else ""), started, started_at)
        except BaseException:  # Ctrl-C: do not leave the command running
            _kill(proc)
            proc.communicate()
            raise
        if proc.returncode != 0:
            tail = _tail(err) or "(no output on stderr)"
            return TrialResult.failed(
                f"command exited with status {proc.returncode}; stderr: {tail}", started, started_at
            )
        try:
            score = parse_score(out)
        except ObjectiveError as exc:
            tail = _tail(err)
            return TrialResult.failed(str(exc) + (f"; stderr: {tail}" if tail else ""), started, started_at)
        return TrialResult(score, "ok", time.perf_counter() - started, None, started_at, utc_now())

    def __repr__(self) -> str:
        return f"CommandObjective({shlex.join(self.argv)!r}, timeout={self.timeout})"


def _kill(proc: subprocess.Popen) -> None:
    """Kill a command and, on POSIX, every process of its session."""
    try:
        if os.name == "posix":
            os.killpg(proc.pid, signal.SIGKILL)
        else:  # pragma: no cover - not POSIX
            proc.kill()
    except (ProcessLookupError, PermissionError):
        pass


# -- local worker processes ------------------------------------------------------
_INSTALLED: Any = None  # the objective inside a worker process


def _install(objective: Any) -> None:
    """Worker initializer: keep the objective (sent once) and leave Ctrl-C to the parent."""
    global _INSTALLED
    _INSTALLED = objective
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # stop_pool terminates workers: end the running trial as an exception so a
    # command objective kills its command and a time limit's trial process stops
    signal.signal(signal.SIGTERM, _exit_on_term)


_TERMINATED = False  # set in a worker by SIGTERM


def _exit_on_term(signum: int, frame: Any) -> None:
    global _TERMINATED
    _TERMINATED = True
    raise SystemExit(128 + signum)


class _Installed:
    """Picklable stand-in for the objective installed in each worker."""

    def __call__(self, config: Mapping) -> Any:
        try:
            return _INSTALLED(config)
        finally:
            if _TERMINATED:
                # concurrent.futures catches the SystemExit of a task and would keep this
                # worker waiting for work, an orphan if the parent is gone: exit once the
                # trial has cleaned up
                try:
                    close = getattr(_INSTALLED, "close", None)
                    if close is not None:
                        close()
                finally:
                    os._exit(128 + signal.SIGTERM)


def local_pool(n_workers: int, objective: Callable) -> tuple[cf.ProcessPoolExecutor, Callable]:
    """A process pool whose workers each receive ``objective`` once.

    Returns the pool and a small picklable stand-in to submit instead of
    the objective, so the data inside it is not sent with every trial.
    Workers are forked from a fresh *fork server* (``spawn`` where there is
    none) that has imported scikit-learn once: forking this process, which
    may have run OpenMP code already, could hang the children. Workers
    ignore Ctrl-C, which the parent handles (see :func:`stop_pool`).

    The workers are not daemonic, so an objective with a time limit can
    start its trial process inside them (:mod:`warmstart.evaluate.deadline`); a
    worker stops that process when it is terminated or exits.
    """
    context = child_context()
    pool = cf.ProcessPoolExecutor(
        max_workers=n_workers,
        mp_context=context,
        initializer=_install,
        initargs=(objective,),
    )
    return pool, _Installed()


def stop_pool(pool: cf.ProcessPoolExecutor) -> None:
    """Drop queued work and stop the workers of a :func:`local_pool` now.

    Each worker is terminated (its running trial ends, and with it a
    command or a trial process it started), then joined; one that has not
    exited after a few seconds is killed.
    """
    # concurrent.futures has no public way to end running tasks before 3.14; take the
    # workers before shutdown(), which drops the executor's reference to them
    workers = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in workers:
        proc.terminate()
    for proc in workers:  # a worker stops its trial process (up to STOP_WAIT_S) before it exits
        proc.join(2 * STOP_WAIT_S + 1.0)
        if proc.is_alive():
            proc.kill()
            proc.join()
