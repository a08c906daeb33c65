"""Shared helpers of the service tests: a seeded archive, a task description,
a real ``warmstart serve`` process on a free loopback port.

Every dataset here is invented (random numbers with fixed seeds standing for
no real customer or person); trial scores follow the Branin function
(a published test function, Dixon and Szegoe 1978), so past studies agree on
where the good region is.
"""

from __future__ import annotations

import contextlib
import math
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

from warmstart.archive.store import Archive
from warmstart.client import task_description

SPACE = {"params": {"x1": {"type": "real", "low": -5.0, "high": 10.0},
                    "x2": {"type": "real", "low": 0.0, "high": 15.0}}}
REPO = Path(__file__).resolve().parent.parent


def branin(x1: float, x2: float) -> float:
    """Branin function (minimum 0.397887 at three points; Dixon and Szegoe 1978)."""
    b, c, t = 5.1 / (4 * math.pi ** 2), 5 / math.pi, 1 / (8 * math.pi)
    return (x2 - b * x1 ** 2 + c * x1 - 6) ** 2 + 10 * (1 - t) * math.cos(x1) + 10


def invented_frame(seed: int, rows: int = 60) -> pd.DataFrame:
    """A small invented classification table (three features, target ``y``)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rows, 3))
    y = (x[:, 0] + 0.3 * seed * x[:, 1] + 0.5 * rng.normal(size=rows) > 0).astype(int)
    return pd.DataFrame({"f1": x[:, 0], "f2": x[:, 1], "f3": x[:, 2], "y": y})


def seed_archive(path: str | Path, n_tasks: int = 3, trials_per_task: int = 24) -> list[int]:
    """Tasks of invented data, each with one 'bran' study of Branin scores (minimised)."""
    from warmstart.space import Space

    space = Space.from_dict(SPACE)
    studies = []
    with Archive(path) as archive:
        for i in range(n_tasks):
            frame = invented_frame(i)
            task = archive.add_task(f"shop {i + 1}", frame, "y")
            study = archive.add_study(task, "bran", space, metric="loss", maximize=False, origin="imported",
                                      owner="dana" if i % 2 == 0 else "lee", tags={"team": "retention"})
            configs = space.sample(trials_per_task, rng=i)
            trials = pd.DataFrame(configs, columns=space.names)
            trials["score"] = [branin(c["x1"], c["x2"]) + 0.1 * i for c in configs]
            archive.add_trials(study, trials)
            archive.finish_study(study)
            studies.append(study)
    return studies


def new_task(seed: int = 7, name: str = "shop new") -> dict:
    """The description a client sends for a new invented task."""
    return task_description(invented_frame(seed), "y", name)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def dump(con) -> dict[str, list[str]]:
    """Every table of the archive, rows sorted (a connection or cursor)."""
    names = [r[0] for r in con.execute(
        "SELECT table_name FROM information_schema.tables WHERE table_schema = 'main' ORDER BY table_name").fetchall()]
    out = {}
    for name in names:
        quoted = '"' + name.replace('"', '""') + '"'  # names from the catalog itself
        out[name] = sorted(repr(row) for row in con.execute(f"SELECT * FROM {quoted}").fetchall())
    return out


class ServerProcess:
    """A real ``warmstart serve`` on 127.0.0.1 (bounded: stopped by the test)."""

    def __init__(self, archive: Path, port: int | None = None, token_file: Path | None = None,
                 log: Path | None = None, options: tuple[str, ...] = ()):
        self.archive, self.port = Path(archive), port or free_port()
        self.token_file = token_file
        self.options = tuple(options)  # more options of `serve`, e.g. ("--no-search-process",)
        self.log = log or self.archive.with_suffix(".log")
        self.proc: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, timeout: float = 90.0) -> "ServerProcess":
        args = [sys.executable, "-c", "from warmstart.cli import main; main()", "--archive", str(self.archive),
                "serve", "--host", "127.0.0.1", "--port", str(self.port)]
        if self.token_file:
            args += ["--token-file", str(self.token_file)]
        args += list(self.options)
        env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
        self._log = open(self.log, "ab")
        self.proc = subprocess.Popen(args, stdout=self._log, stderr=self._log, env=env, cwd=str(REPO))
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited with {self.proc.returncode}: {self.log.read_text()[-2000:]}")
            with contextlib.suppress(OSError):
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.5):
                    return self
            time.sleep(0.2)
        self.kill()
        raise RuntimeError(f"server did not listen within {timeout} s: {self.log.read_text()[-2000:]}")

    def kill(self) -> None:
        """kill -9: no clean stop."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(30)
        self._close_log()

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 60.0) -> int:
        """A clean stop; returns the exit code."""
        assert self.proc is not None
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.kill()
                raise
        self._close_log()
        return self.proc.returncode

    def _close_log(self) -> None:
        log = getattr(self, "_log", None)
        if log is not None and not log.closed:
            log.close()

    def __enter__(self) -> "ServerProcess":
        return self.start()

    def __exit__(self, *exc) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.stop()


def add_served_study(service, task: dict, space, search, origin: str, record) -> int:
    """Register ``task`` and add a study of it through ``service``'s writer (as
    ``POST /studies`` does), its search adopted by the lease book; the study id."""
    from warmstart.service.api import register
    from warmstart.service.models import TaskInfo

    def write(archive):
        study = archive.add_study(register(archive, TaskInfo(**task)), "bran", space, metric="loss",
                                  maximize=False, origin=origin, prior=record)
        service.leases.adopt(study, search)
        return 201, study

    return service.writer.submit(write).result(60).body
