"""Benchmark: what one study's search costs per propose + record, as the service asks.

The scenario is invented: the fictional grocery cooperative of
``bench_service.py`` tunes one model family on a new store, warm-started from
three invented stores' studies (scores from the Branin test function), or
cold. Without HTTP or archive, one search takes ``--trials`` proposals with
``--pending`` configs leased at once (each result recorded when ``--pending``
newer proposals wait, as parallel workers do), in one process with one BLAS
thread, as the service's search process runs it.

Printed per search (warm ``MixtureSearch``, cold ``DensitySearch``): the CPU
milliseconds per propose + record pair, the best of ``--repeats`` runs. The
searches' proposals are a function of the seed and the results: a change made
for speed must leave them as they were. ``--dump FILE`` writes every proposal
of the run as JSON, ``--compare FILE`` checks them against such a file
(exit status 1 on the first difference).

Run::

    python examples/bench_search_cost.py                        # 800 proposals, 16 pending, best of 3
    python examples/bench_search_cost.py --dump after.json
    PYTHONPATH=/path/to/older/checkout python examples/bench_search_cost.py --dump before.json
    python examples/bench_search_cost.py --compare before.json  # the same proposals?
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # the seeded archive of the service tests
sys.path.append(str(ROOT))  # after PYTHONPATH: an older checkout put there is the one measured

from service_support import SPACE, branin, new_task, seed_archive  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

from warmstart.archive.store import Archive  # noqa: E402
from warmstart.service.searches import start_search  # noqa: E402
from warmstart.space import Space  # noqa: E402


def run(archive_path: Path, cold: bool, trials: int, pending: int) -> tuple[float, list[dict], str]:
    """CPU seconds per pair, the proposals, and the search's class name."""
    with Archive(archive_path) as archive:
        search, *_ = start_search(archive, new_task(seed=10)["profile"], [], "bran", Space.from_dict(SPACE),
                                  False, cold=cold)
    proposals, waiting = [], []
    with threadpool_limits(limits=1, user_api="blas"):
        cpu = time.process_time()
        for _ in range(trials):
            config = search.propose()
            proposals.append(config)
            waiting.append(config)
            if len(waiting) > pending:
                done = waiting.pop(0)
                search.record(done, branin(done["x1"], done["x2"]))
        cost = (time.process_time() - cpu) / trials
    return cost, proposals, type(search).__name__


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--trials", type=int, default=800, help="proposals per run (default 800)")
    parser.add_argument("--pending", type=int, default=16, help="configs leased at once (default 16)")
    parser.add_argument("--repeats", type=int, default=3, help="runs per search; the best is shown (default 3)")
    parser.add_argument("--dump", help="write the proposals of the run to this JSON file")
    parser.add_argument("--compare", help="check the proposals against this JSON file (from --dump)")
    args = parser.parse_args()
    import warmstart

    print(f"warmstart from {Path(warmstart.__file__).parent}; {os.cpu_count()} cores, load average "
          f"{os.getloadavg()[0]:.2f}; {args.trials} proposals, {args.pending} pending, best of {args.repeats}")
    folder = Path(tempfile.mkdtemp(prefix="bench-search-"))
    seen: dict[str, list[dict]] = {}
    try:
        seed_archive(folder / "seeded.duckdb")
        for label, cold in (("warm", False), ("cold", True)):
            costs = []
            for _ in range(max(1, args.repeats)):
                cost, proposals, name = run(folder / "seeded.duckdb", cold, args.trials, args.pending)
                costs.append(cost)
            seen[label] = proposals
            print(f"{label} ({name}): {min(costs) * 1000:.3f} ms of CPU per propose + record pair "
                  f"(runs: {', '.join(f'{c * 1000:.3f}' for c in costs)})", flush=True)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    if args.dump:
        Path(args.dump).write_text(json.dumps(seen, sort_keys=True))
        print(f"proposals written to {args.dump}")
    if args.compare:
        before = json.loads(Path(args.compare).read_text())
        for label, proposals in seen.items():
            theirs = before.get(label, [])
            first = next((i for i, (a, b) in enumerate(zip(proposals, theirs)) if a != b), None)
            if first is None and len(theirs) == len(proposals):
                print(f"{label}: the same {len(proposals)} proposals as {args.compare}")
            else:
                at = first if first is not None else min(len(theirs), len(proposals))
                sys.exit(f"{label}: proposal {at + 1} differs from {args.compare} "
                         f"({len(proposals)} here, {len(theirs)} there)")


if __name__ == "__main__":
    main()
