"""Benchmark: looking up a batch's request ids among the answers a service keeps.

The scenario is invented: a fictional team's service has stored answers to
N earlier write requests (it keeps 30 days of them). Each batch of writes
carries up to 64 client request ids (here 16 random ones, all new, the
common case; the stored ones are random-looking too, so no block of the
table can be skipped by its min/max);
the writer must know whether any was answered before. Printed per N: the
lookup in DuckDB's ``requests`` table as the writer made it before
(one join against the batch's ids), a one-id lookup by the primary key,
and :class:`warmstart.service.seen.SeenRequests` (the writer's in-memory
hashes: no query for a new id), with their ratio, and the time to build the
hashes at start-up. A real DuckDB file in a temporary folder.

Run::

    python examples/bench_request_lookup.py
    python examples/bench_request_lookup.py --sizes 10000 100000
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from warmstart.archive.store import Archive  # noqa: E402
from warmstart.service.seen import SeenRequests  # noqa: E402

JOIN = ("SELECT r.principal, r.request_id, r.route, r.body_sha256, r.status, r.response FROM requests r "
        "JOIN (SELECT unnest(?::VARCHAR[]) AS p, unnest(?::VARCHAR[]) AS i) k "
        "ON r.principal = k.p AND r.request_id = k.i")


def _per_call_ms(fn, repeats: int) -> float:
    fn()
    t0 = time.perf_counter()
    for _ in range(repeats):
        fn()
    return (time.perf_counter() - t0) / repeats * 1000


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[10_000, 200_000, 1_000_000],
                        help="stored answers (cumulative: the table grows from one size to the next)")
    parser.add_argument("--ids", type=int, default=16, help="request ids per batch")
    parser.add_argument("--repeats", type=int, default=30)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder, Archive(Path(folder) / "answers.duckdb") as archive:
        con, have = archive.con, 0
        for n in sorted(args.sizes):
            with archive.transaction():
                con.execute("INSERT INTO requests SELECT 'dana', md5(i::VARCHAR), 'POST /x', '00', 200, '{}', "
                            "now()::TIMESTAMP FROM range(?, ?) t(i)", [have, n])
            have = n
            new_ids = [uuid.uuid4().hex for _ in range(args.ids)]  # ids as clients make them: random
            t0 = time.perf_counter()
            seen = SeenRequests.load(con)
            build = time.perf_counter() - t0
            join = _per_call_ms(lambda: con.execute(JOIN, [["dana"] * len(new_ids), new_ids]).fetchall(),
                                args.repeats)
            one = _per_call_ms(lambda: con.execute("SELECT status FROM requests WHERE principal = ? AND "
                                                   "request_id = ?", ["dana", new_ids[0]]).fetchall(),
                               args.repeats)
            memory = _per_call_ms(lambda: [seen.may_hold("dana", i) for i in new_ids], args.repeats)
            print(f"{n:>9,} stored answers, {args.ids} new ids: table join {join:.2f} ms, one id by the primary "
                  f"key {one:.2f} ms, in-memory hashes {memory:.3f} ms ({join / memory:,.0f}x less than the "
                  f"join); hashes built in {build:.2f} s", flush=True)


if __name__ == "__main__":
    main()
