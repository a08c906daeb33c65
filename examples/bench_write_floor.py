"""Benchmark: where the time of one lone write goes in the team service.

One client alone on an idle service sends one write at a time, so each write
is a batch of its own and pays a whole transaction: that is the latency floor
under any load. This runs the service's app in this process (FastAPI's test
client: no sockets, searches in this process) on an archive seeded with three
invented stores' studies (the fictional grocery cooperative of
``bench_service.py``; Branin scores), makes a warm study and sends ``--writes``
lone propose and record requests. The archive's connection is wrapped so that
every DuckDB call of the writer is timed by kind of statement.

Printed per kind of write: the p50 wall time of the request, the mean time in
each kind of DuckDB statement, and what is left (Python: the lease book, the
search, the app). Run::

    python examples/bench_write_floor.py                # 100 proposes and 100 records
    python examples/bench_write_floor.py --writes 300 --threads 1   # DuckDB on one thread
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # the seeded archive of the service tests
sys.path.insert(0, str(ROOT))

from service_support import SPACE, branin, new_task, seed_archive  # noqa: E402

from warmstart.archive.store import Archive  # noqa: E402


def kind_of(sql: str) -> str:
    """A short name for a statement: its verb and table."""
    words = sql.split()
    if not words:
        return "?"
    verb = words[0].upper()
    if verb in ("INSERT", "DELETE") and len(words) > 2:
        return f"{verb} {words[2]}"
    if verb == "UPDATE" and len(words) > 1:
        return f"UPDATE {words[1]}"
    return " ".join(words[:3])


class TimedConnection:
    """A DuckDB connection whose execute, begin and commit are timed (by kind) while ``on``."""

    def __init__(self, con):
        self._con = con
        self.spent: dict[str, float] = defaultdict(float)
        self.on = False

    def _timed(self, name: str, call, *args):
        if not self.on:
            return call(*args)
        t0 = time.perf_counter()
        try:
            return call(*args)
        finally:
            self.spent[name] += time.perf_counter() - t0

    def execute(self, sql, *params):
        return self._timed(kind_of(sql), self._con.execute, sql, *params)

    def begin(self):
        return self._timed("BEGIN", self._con.begin)

    def commit(self):
        return self._timed("COMMIT", self._con.commit)

    def __getattr__(self, name):
        return getattr(self._con, name)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--writes", type=int, default=100, help="lone proposes and as many records (default 100)")
    ap.add_argument("--threads", type=int, default=0, help="DuckDB threads (default: DuckDB's own, the cores)")
    args = ap.parse_args()
    from fastapi.testclient import TestClient

    from warmstart.service.app import create_app

    folder = Path(tempfile.mkdtemp(prefix="bench-floor-"))
    try:
        seed_archive(folder / "seeded.duckdb")
        archive = Archive(folder / "seeded.duckdb")
        if args.threads:
            archive.con.execute(f"SET threads TO {int(args.threads)}")
        timed = TimedConnection(archive.con)
        archive.con = timed  # the writer's statements go through the wrapper (readers use cursors of their own)
        with TestClient(create_app(archive, search_process=False)) as client:
            answer = client.post("/api/v1/studies", json={"task": new_task(seed=90, name="store alone"),
                                                          "learner": "bran", "space": SPACE, "metric": "loss",
                                                          "maximize": False})
            answer.raise_for_status()
            study = answer.json()["study_id"]
            walls: dict[str, list[float]] = {"propose": [], "record": []}
            spent: dict[str, dict[str, float]] = {"propose": defaultdict(float), "record": defaultdict(float)}
            def post(kind: str, path: str, body: dict, key: str, measured: bool) -> dict:
                timed.spent.clear()
                timed.on = measured
                t0 = time.perf_counter()
                answer = client.post(path, json=body, headers={"Idempotency-Key": key})
                wall = time.perf_counter() - t0
                timed.on = False
                answer.raise_for_status()
                if measured:
                    walls[kind].append(wall)
                    for name, seconds in timed.spent.items():
                        spent[kind][name] += seconds
                return answer.json()

            for k in range(args.writes + 10):  # the first 10 pairs warm up
                measured = k >= 10
                lease = post("propose", f"/api/v1/studies/{study}/propose", {"k": 1}, f"floor-p-{k}",
                             measured)["leases"][0]
                x = lease["config"]
                post("record", f"/api/v1/studies/{study}/trials",
                     {"trial": lease["trial"], "score": branin(x["x1"], x["x2"])}, f"floor-r-{k}", measured)
        archive.close()
        n = args.writes
        print(f"{n} lone writes of each kind, one warm study, app in process (no sockets), DuckDB threads: "
              f"{args.threads or 'default'}")
        for kind in ("propose", "record"):
            db = sum(spent[kind].values()) / n
            mean_wall = float(np.mean(walls[kind]))
            parts = ", ".join(f"{name} {seconds / n * 1000:.2f}" for name, seconds in
                              sorted(spent[kind].items(), key=lambda item: -item[1]))
            print(f"  {kind}: p50 {np.median(walls[kind]) * 1000:.2f} ms (mean {mean_wall * 1000:.2f}); DuckDB "
                  f"{db * 1000:.2f} ms ({parts}); the rest {(mean_wall - db) * 1000:.2f} ms")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
