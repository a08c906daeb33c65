"""Shared fixtures: small, generic building blocks for the test files.

The data here is invented (random numbers with a fixed seed); it stands for no
real dataset, customer or person.
"""

from __future__ import annotations

import contextlib
import copy
import subprocess
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from warmstart.space import Space

# A small space with every kind: a log real, a linear real, a log integer, a
# linear integer, a choice, and a parameter active for one level only.
SPACE_DICT = {
    "params": {
        "C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
        "tol": {"type": "real", "low": 0.0, "high": 0.5},
        "n_trees": {"type": "integer", "low": 10, "high": 1000, "log": True},
        "depth": {"type": "integer", "low": 1, "high": 8},
        "kernel": {"type": "choice", "choices": ["rbf", "poly", "linear"]},
        "degree": {"type": "integer", "low": 2, "high": 5, "when": {"kernel": ["poly"]}},
    }
}


@pytest.fixture
def space_dict() -> dict:
    """A fresh copy of :data:`SPACE_DICT` (safe to modify)."""
    return copy.deepcopy(SPACE_DICT)


@pytest.fixture
def space() -> Space:
    """:data:`SPACE_DICT` as a :class:`Space`."""
    return Space.from_dict(SPACE_DICT)


@pytest.fixture
def small_frame() -> pd.DataFrame:
    """60 rows, three numeric features and a two-class target ``y`` (random, fixed seed)."""
    rng = np.random.default_rng(7)
    x = rng.normal(size=(60, 3))
    y = (x[:, 0] + 0.5 * rng.normal(size=60) > 0).astype(int)
    return pd.DataFrame({"f1": x[:, 0], "f2": x[:, 1], "f3": x[:, 2], "y": y})


@pytest.fixture
def archive_path(tmp_path: Path) -> Path:
    """Where a test archive file goes (the folder does not exist yet)."""
    return tmp_path / "store" / "test.duckdb"


def dump_tables(source: str | Path | duckdb.DuckDBPyConnection) -> dict[str, list[str]]:
    """Canonical dump of every table of a DuckDB file: table -> sorted row reprs.

    ``source`` is a file (opened read-only with DuckDB itself, not through
    warmstart) or an open connection. Compares an archive before and after a
    command that should change nothing.
    """
    own = not isinstance(source, duckdb.DuckDBPyConnection)
    con = duckdb.connect(str(source), read_only=True) if own else source
    try:
        names = [r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.tables WHERE table_schema = 'main' ORDER BY table_name"
        ).fetchall()]
        out = {}
        for name in names:
            quoted = '"' + name.replace('"', '""') + '"'  # names come from the catalog itself
            out[name] = sorted(repr(row) for row in con.execute(f"SELECT * FROM {quoted}").fetchall())
        return out
    finally:
        if own:
            con.close()


@pytest.fixture
def table_dump():
    """The :func:`dump_tables` helper, as a fixture."""
    return dump_tables


@contextlib.contextmanager
def _held_open(path: str | Path):
    """Another process (a real one) keeps ``path`` open for writing until the block ends."""
    code = "import sys, duckdb; con = duckdb.connect(sys.argv[1]); print('ready', flush=True); sys.stdin.read()"
    proc = subprocess.Popen([sys.executable, "-c", code, str(path)], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "ready"
        yield proc.pid
    finally:
        proc.stdin.close()
        proc.wait(timeout=60)
        proc.stdout.close()


@pytest.fixture
def held_open():
    """``with held_open(path) as pid:`` -- a second process holds the DuckDB file for writing."""
    return _held_open


@pytest.fixture(scope="module")
def one_blas_thread():
    """Run a test module on one BLAS/OpenMP thread, as the objective's trials run: reference fits and
    small matrices stay fast and repeatable on a busy machine. Use it with
    ``pytestmark = pytest.mark.usefixtures("one_blas_thread")``."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        yield


#: test files that take longest (the starter replay builds four leave-one-task-out replays): run
#: first, so the two test processes (pytest-xdist, one file per process) finish close together
#: instead of one long file starting last
SLOW_FILES_FIRST = ("test_starter_replay.py", "test_prior.py", "test_starter.py", "test_demo.py", "test_replay.py",
                    "test_live.py")


def pytest_collection_modifyitems(session, config, items):
    """Move the slow files to the front, each file's tests in their own order (a stable sort)."""
    rank = {name: i for i, name in enumerate(SLOW_FILES_FIRST)}
    items.sort(key=lambda item: rank.get(item.path.name, len(rank)))
