"""Benchmark: the team service under 32 concurrent training jobs.

The scenario is invented: a fictional grocery cooperative's team tunes one
model family on many stores at once. A real ``warmstart serve`` runs on
127.0.0.1 (a free port) over an archive seeded with three invented stores'
studies (scores from the Branin test function); 32 clients, in 4 processes of
8 threads, each run 50 propose + record pairs (the "training" is the Branin
function: no time), first all on one study, then spread over 8 studies.

Printed per scenario: requests/s, records/s, p50/p99 latency of a propose +
record pair, the CPU the server and the clients spent per pair, and the
checks: every answered record is in the archive, and no config was leased
twice while pending (two leases of one config never overlap in time).

The clients run a closed loop (each starts its next pair when the last is
answered, no training time), where records/s = clients / pair latency: at
32 clients a p50 of 20 ms would need 1,600 records/s. The paced scenarios
(``--rate``, default the 300 pairs/s of the goal, on fresh studies) offer
that many pairs per second, each client its share on its own schedule, and
show the latency at that throughput. Goals (issue 16): p50 <= 20 ms, p99 <= 100 ms, >= 300
records/s on 2 cores. Baselines measured in the same run: the same pairs
in one process without HTTP (``DensitySearch.propose`` + ``Archive.record_trial``),
``GET /api/v1/health`` at 32 clients (the HTTP stack's floor), one client alone
on a warm study (a batch per write: the latency floor under any load), and one trial
recorded alone by the one-row INSERT against a one-row table (the earlier path). The
clients share the 2 cores with the server. A plot of the pair latencies goes
to ``--plot``.

The studies' searches run in child processes of the server
(``serve --search-process``, spread over ``--search-processes`` of them,
serve's default unless given) or in the server's own process
(``--no-search-process``); ``--search-process both`` (the default) runs every
scenario against one server of each kind, back to back on fresh copies of
the seeded archive, and prints them side by side. The server's CPU counts
its child processes' CPU.

Run::

    python examples/bench_service.py                      # 32 clients x 50 pairs, both kinds of server
    python examples/bench_service.py --clients 8 --pairs 20
    python examples/bench_service.py --rate 0                # closed loop only
    python examples/bench_service.py --search-process child  # one kind only
    python examples/bench_service.py --search-process child --search-processes 1
    python examples/bench_service.py --stored-answers 1000000  # after weeks of answers kept
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # the seeded archive and server helpers of the service tests
sys.path.insert(0, str(ROOT))

from service_support import SPACE, ServerProcess, branin, new_task, seed_archive  # noqa: E402

from warmstart.client import Client  # noqa: E402

GOALS = {"p50_ms": 20.0, "p99_ms": 100.0, "records_per_s": 300.0}
PROCESSES = 4
DEADLINE_S = 600  # the whole load stops by itself after this


def _client_thread(url: str, studies: list[int], pairs: int, index: int, out: list, stop_at: float,
                   train_s: float = 0.0, every_s: float = 0.0, start_at: float = 0.0) -> None:
    rng = np.random.default_rng(index)
    with Client(url, retries=3, timeout=60) as client:
        for k in range(pairs):
            if time.monotonic() > stop_at:
                return
            if every_s:  # paced: this client's k-th pair starts at its slot (at once when late)
                wait = start_at + k * every_s - time.monotonic()
                if wait > 0:
                    time.sleep(wait)
            study = int(studies[rng.integers(len(studies))])
            t0 = time.perf_counter()
            lease = client.propose(study)[0]
            t1 = time.perf_counter()
            score = branin(lease["config"]["x1"], lease["config"]["x2"])
            if train_s:
                time.sleep(train_s)
            t2 = time.perf_counter()
            answer = client.record(study, trial=lease["trial"], score=score)
            t3 = time.perf_counter()
            out.append({"study": study, "trial": lease["trial"], "number": answer["number"], "score": score,
                        "config": json.dumps(lease["config"], sort_keys=True), "leased": t1, "recording": t2,
                        "pair_s": (t1 - t0) + (t3 - t2)})


def _client_process(args) -> tuple[list[dict], float]:
    """One process of client threads: their pairs, and the CPU seconds the process spent."""
    url, studies, pairs, threads, first, stop_at, train_s, every_s, start_at = args
    out: list[dict] = []
    cpu = time.process_time()
    workers = [threading.Thread(target=_client_thread, args=(url, studies, pairs, first + i, out, stop_at, train_s,
                                                             every_s, start_at + (first + i) * every_s / (4 * threads)))
               for i in range(threads)]
    for w in workers:
        w.start()
    for w in workers:
        w.join()
    return out, time.process_time() - cpu


def _health_thread(url: str, n: int, out: list) -> None:
    with Client(url) as client:
        for _ in range(n):
            t0 = time.perf_counter()
            client.health()
            out.append(time.perf_counter() - t0)


def _health_process(args) -> list[float]:
    url, n, threads = args
    out: list[float] = []
    workers = [threading.Thread(target=_health_thread, args=(url, n, out)) for _ in range(threads)]
    for w in workers:
        w.start()
    for w in workers:
        w.join()
    return out


def lone_client(url: str, study: int, pairs: int = 60) -> tuple[float, float]:
    """p50 seconds of a propose and of a record by one client alone on an idle service
    (one write per batch: the floor under any load; the first 10 pairs warm up)."""
    proposes, records = [], []
    with Client(url) as client:
        for k in range(pairs + 10):
            t0 = time.perf_counter()
            [lease] = client.propose(study)
            t1 = time.perf_counter()
            config = lease["config"]
            client.record(study, trial=lease["trial"], score=branin(config["x1"], config["x2"]))
            if k >= 10:
                proposes.append(t1 - t0)
                records.append(time.perf_counter() - t1)
    return float(np.median(proposes)), float(np.median(records))


def _spin(seconds: float) -> float:
    """Busy for ``seconds`` of wall time; the CPU seconds this process got meanwhile."""
    start, cpu = time.monotonic(), time.process_time()
    while time.monotonic() - start < seconds:
        pass
    return time.process_time() - cpu


def cores_available(seconds: float = 2.0) -> float:
    """Cores two busy processes of ours get together right now (2.0 on an idle machine
    with 2 cores; less when other work on the machine takes its share)."""
    with mp.get_context("spawn").Pool(2) as pool:
        pool.map(_warm, range(2))
        return sum(pool.map(_spin, [seconds] * 2)) / seconds


def _warm(_: int) -> int:
    """Nothing: makes each pool process import the client before anything is timed."""
    return os.getpid()


def process_cpu(pid: int, children: bool = True) -> float | None:
    """CPU seconds (user + system) a process and its children have used so far: its own,
    its children's that ended and were waited for, and its live descendants' (``children``
    False: its own only); None where /proc is missing."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        ticks = sum(int(f) for f in fields[11:15 if children else 13])  # utime, stime, cutime, cstime
    except (OSError, ValueError, IndexError):
        return None
    if not children:
        return ticks / os.sysconf("SC_CLK_TCK")
    parents: dict[int, list[tuple[int, int]]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                f = Path(f"/proc/{entry}/stat").read_text().rsplit(")", 1)[1].split()
                parents.setdefault(int(f[1]), []).append((int(entry), int(f[11]) + int(f[12])))
            except (OSError, ValueError, IndexError):
                continue
    todo = [pid]
    while todo:  # live descendants (the search process, multiprocessing's resource tracker)
        for child, own in parents.get(todo.pop(), []):
            ticks += own
            todo.append(child)
    return ticks / os.sysconf("SC_CLK_TCK")


def run_load(url: str, studies: list[int], clients: int, pairs: int, pool, train_s: float = 0.0,
             rate: float = 0.0) -> tuple[list[dict], float, float]:
    """Every client's pairs, the wall time and the clients' CPU seconds. ``rate`` > 0 paces
    the clients to that many pairs per second together (each its share, staggered)."""
    per = clients // PROCESSES
    stop_at = time.monotonic() + DEADLINE_S
    every_s = clients / rate if rate else 0.0
    start_at = time.monotonic() + 0.5
    jobs = [(url, studies, pairs, per, p * per, stop_at, train_s, every_s, start_at) for p in range(PROCESSES)]
    t0 = time.perf_counter()
    results = pool.map(_client_process, jobs)
    wall = time.perf_counter() - t0 - (0.5 if rate else 0.0)
    return [r for part, _ in results for r in part], wall, sum(cpu for _, cpu in results)


def check(url: str, rows: list[dict], studies: list[int]) -> tuple[bool, bool]:
    """(every answered record is in the archive, no config leased twice while pending)."""
    with Client(url) as client:
        recorded = {}
        for study in studies:
            trials = client.trials(study)
            recorded[study] = dict(zip(trials["number"], trials["score"]))
    all_there = all(abs(recorded[r["study"]].get(r["number"], float("nan")) - r["score"]) < 1e-9 for r in rows)
    by_key: dict = {}
    for r in rows:
        by_key.setdefault((r["study"], r["config"]), []).append((r["leased"], r["recording"]))
    # a lease is pending from before it was answered until its record was sent: two leases of one
    # config are a duplicate only if those spans overlap (the clocks of 4 processes are one monotonic clock)
    distinct = True
    for spans in by_key.values():
        spans.sort()
        for (a0, a1), (b0, b1) in zip(spans, spans[1:]):
            if b0 < a1:
                distinct = False
    return all_there, distinct


def baseline_in_process(n: int) -> float:
    """Seconds per propose + record pair without HTTP: one process, one study."""
    from warmstart.archive.store import Archive
    from warmstart.search.density import DensitySearch
    from warmstart.space import Space

    space = Space.from_dict(SPACE)
    folder = Path(tempfile.mkdtemp(prefix="bench-local-"))
    try:
        with Archive(folder / "local.duckdb") as archive:
            from service_support import invented_frame

            task = archive.add_task("local", invented_frame(5), "y")
            study = archive.add_study(task, "bran", space, metric="loss", maximize=False)
            search = DensitySearch(space, seed=0, maximize=False)
            t0 = time.perf_counter()
            for _ in range(n):
                config = search.propose()
                score = branin(config["x1"], config["x2"])
                archive.record_trial(study, config, score)
                search.record(config, score)
            return (time.perf_counter() - t0) / n
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def record_paths(n: int) -> tuple[float, float]:
    """Seconds per trial recorded alone (its own commit): the one-row INSERT of
    ``Archive.record_trial`` and the table path (``Archive.add_trials`` of a one-row frame,
    what ``record_trial`` did before), on one file, same configs."""
    import pandas as pd

    from service_support import invented_frame

    from warmstart.archive.store import Archive
    from warmstart.space import Space

    space = Space.from_dict(SPACE)
    folder = Path(tempfile.mkdtemp(prefix="bench-record-"))
    try:
        with Archive(folder / "record.duckdb") as archive:
            task = archive.add_task("local", invented_frame(5), "y")
            one, table = (archive.add_study(task, "bran", space, metric="loss", maximize=False) for _ in range(2))
            configs = space.sample(n + 1, rng=0)
            archive.record_trial(one, configs[0], 1.0)
            archive.add_trials(table, pd.DataFrame([configs[0]]).assign(score=1.0))
            t0 = time.perf_counter()
            for c in configs[1:]:
                archive.record_trial(one, c, branin(c["x1"], c["x2"]))
            t1 = time.perf_counter()
            for c in configs[1:]:
                archive.add_trials(table, pd.DataFrame([c]).assign(score=branin(c["x1"], c["x2"])))
            t2 = time.perf_counter()
        return (t1 - t0) / n, (t2 - t1) / n
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def proposer_cost(n: int) -> dict[str, tuple[float, float]]:
    """Per propose + record pair of one warm study's search, without HTTP or archive:
    (seconds of the calling thread, seconds of the process and its children) through the
    in-process proposer and through the child-process one (what the service's own
    process spends on the search, and what the search costs in all)."""
    import pickle

    from threadpoolctl import threadpool_limits

    from warmstart.archive.store import Archive
    from warmstart.service.proposer import InProcessProposer
    from warmstart.service.search_process import ChildProcessProposer
    from warmstart.service.searches import start_search
    from warmstart.space import Space

    folder = Path(tempfile.mkdtemp(prefix="bench-proposer-"))
    out = {}
    try:
        seed_archive(folder / "seeded.duckdb")
        with Archive(folder / "seeded.duckdb") as archive:
            search, *_ = start_search(archive, new_task(seed=10)["profile"], [], "bran", Space.from_dict(SPACE), False)
        frozen = pickle.dumps(search)
        with threadpool_limits(limits=1, user_api="blas"):  # as the service runs
            for name, proposer in (("in-process", InProcessProposer()), ("child", ChildProcessProposer())):
                proposer.start()
                proposer.adopt(1, pickle.loads(frozen))
                proposer.studies()  # started and holding the search
                cpu, thread = process_cpu(os.getpid()), time.thread_time()
                for _ in range(n):
                    [[(key, config)]] = proposer.ask_many([(1, 1)])()
                    proposer.record(1, key, branin(config["x1"], config["x2"]), "ok")
                proposer.studies()  # every result applied
                out[name] = ((time.thread_time() - thread) / n, (process_cpu(os.getpid()) - cpu) / n)
                proposer.close()
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return out


def summary(rows: list[dict], wall: float) -> dict:
    pair = np.array([r["pair_s"] for r in rows]) * 1000
    return {"pairs": len(rows), "wall_s": wall, "requests_per_s": 2 * len(rows) / wall,
            "records_per_s": len(rows) / wall, "p50_ms": float(np.percentile(pair, 50)),
            "p99_ms": float(np.percentile(pair, 99)), "latencies_ms": pair}


def plot(results: dict, path: Path) -> None:
    """One panel per kind of server (``results``: kind -> label -> summary): the share of
    pairs at most so slow, per scenario."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    titles = {"child": "searches in child processes", "in-process": "searches in the server process"}
    fig, axes = plt.subplots(1, len(results), figsize=(7 * len(results), 4), sharex=True, sharey=True,
                             squeeze=False)
    for ax, (kind, by_label) in zip(axes[0], results.items()):
        for label, s in by_label.items():
            x = np.sort(s["latencies_ms"])
            ax.plot(x, np.arange(1, x.size + 1) / x.size,
                    label=f"{label} ({s['records_per_s']:.0f}/s, p50 {s['p50_ms']:.0f} ms)",
                    linestyle="--" if "pairs/s" in label else "-")  # dashed: paced
        for q, goal in (("p50", GOALS["p50_ms"]), ("p99", GOALS["p99_ms"])):
            ax.axvline(goal, color="grey", linestyle=":", linewidth=1)
            ax.text(goal, 0.02, f" goal {q}", color="grey", fontsize=8)
        ax.set_xscale("log")
        ax.set_xlabel("propose + record pair latency (ms, log scale)")
        ax.set_title(f"warmstart serve, {titles.get(kind, kind)}", fontsize=10)
        ax.legend(fontsize=7)
    axes[0][0].set_ylabel("share of pairs at most this slow")
    fig.suptitle("32 concurrent clients (invented scenario)", fontsize=10)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def store_answers(path: Path, n: int) -> None:
    """``n`` invented answers to earlier requests in the ``requests`` table (random-looking ids, as
    clients make them, that no client of the load sends), under the load's principal (no token: '')."""
    from warmstart.archive.store import Archive

    t0 = time.perf_counter()
    with Archive(path) as archive, archive.transaction() as con:
        con.execute("INSERT INTO requests SELECT '', md5(i::VARCHAR), 'POST /api/v1/studies/1/record', "
                    "'00', 200, '{}', now()::TIMESTAMP FROM range(?) t(i)", [n])
    print(f"stored {n:,} answers to earlier requests in {time.perf_counter() - t0:.1f} s", flush=True)


def load_server(server: ServerProcess, args, pool, local: float) -> tuple[dict, bool]:
    """Every scenario against one running server: their summaries (by label) and whether
    every check passed."""
    results: dict = {}
    ok = True
    scenarios = []  # (label, studies, offered pairs/s or 0 for a closed loop)
    with Client(server.url) as client:
        for paced, rate in ((False, 0.0), (True, args.rate)):
            if paced and not rate:
                continue
            tag = f" at {rate:g} pairs/s" if paced else ""
            base = 40 if paced else 10
            studies = [client.new_study(new_task(seed=base + i, name=f"store {base + i}"), "bran", space=SPACE,
                                        metric="loss", maximize=False)["study_id"] for i in range(8)]
            cold = client.new_study(new_task(seed=base + 20, name=f"store cold {base}"), "bran", space=SPACE,
                                    metric="loss", maximize=False, cold=True)["study_id"]
            scenarios += [("one cold study" + tag, [cold], rate), ("one warm study" + tag, studies[:1], rate),
                          ("8 warm studies" + tag, studies, rate)]
    t0 = time.perf_counter()
    health = [x for part in pool.map(_health_process, [(server.url, 20, args.clients // PROCESSES)] * PROCESSES)
              for x in part]
    health_wall = time.perf_counter() - t0
    print(f"baseline, GET /api/v1/health at {args.clients} clients: p50 {np.percentile(health, 50) * 1000:.1f} ms, "
          f"{len(health) / health_wall:.0f} requests/s", flush=True)
    with Client(server.url) as client:
        alone = client.new_study(new_task(seed=90, name="store alone"), "bran", space=SPACE, metric="loss",
                                 maximize=False)["study_id"]
    propose_s, record_s = lone_client(server.url, alone)
    print(f"baseline, one client alone on a warm study (a batch per write, the floor under any load): propose p50 "
          f"{propose_s * 1000:.1f} ms, record p50 {record_s * 1000:.1f} ms, a pair {(propose_s + record_s) * 1000:.1f} "
          f"ms (goal <= {GOALS['p50_ms']:.0f})", flush=True)
    for label, chosen, rate in scenarios:
        load_before = os.getloadavg()[0]
        server_cpu = process_cpu(server.proc.pid)
        own_cpu = process_cpu(server.proc.pid, children=False)
        rows, wall, client_cpu = run_load(server.url, chosen, args.clients, args.pairs, pool,
                                          args.train_ms / 1000, rate)
        server_cpu = None if server_cpu is None else process_cpu(server.proc.pid) - server_cpu
        own_cpu = None if own_cpu is None else process_cpu(server.proc.pid, children=False) - own_cpu
        s = summary(rows, wall)
        s["server_cpu_ms"] = None if server_cpu is None else server_cpu / max(s["pairs"], 1) * 1000
        s["own_cpu_ms"] = None if own_cpu is None else own_cpu / max(s["pairs"], 1) * 1000
        all_there, distinct = check(server.url, rows, chosen)
        results[label] = s
        ok &= all_there and distinct and s["pairs"] == args.clients * args.pairs
        print(f"\n{label}: {args.clients} clients x {args.pairs} propose + record pairs"
              + (f" ({args.train_ms:g} ms training each)" if args.train_ms else "")
              + f", {s['pairs']} answered in {s['wall_s']:.1f} s", flush=True)
        print(f"  requests/s {s['requests_per_s']:.0f}   records/s {s['records_per_s']:.0f} "
              f"(goal >= {GOALS['records_per_s']:.0f}: {s['records_per_s'] / GOALS['records_per_s']:.2f}x)")
        print(f"  pair latency p50 {s['p50_ms']:.1f} ms (goal <= {GOALS['p50_ms']:.0f}: "
              f"{s['p50_ms'] / GOALS['p50_ms']:.1f}x the goal)   p99 {s['p99_ms']:.1f} ms (goal <= "
              f"{GOALS['p99_ms']:.0f}: {s['p99_ms'] / GOALS['p99_ms']:.1f}x the goal)")
        print(f"  vs one process without HTTP: {s['p50_ms'] / (local * 1000):.1f}x its time per pair, "
              f"{s['records_per_s'] * local:.2f}x its records/s")
        shown = "n/a" if server_cpu is None else (f"{s['server_cpu_ms']:.2f} ms (its own process "
                                                  f"{own_cpu / s['pairs'] * 1000:.2f} ms)")
        print(f"  CPU per pair: server (with its children) {shown}, clients {client_cpu / s['pairs'] * 1000:.2f} ms "
              f"(the clients share the {os.cpu_count()} cores; load average before {load_before:.2f}, "
              f"now {os.getloadavg()[0]:.2f})")
        print(f"  every answered record in the archive: {all_there}; no config leased twice while pending: "
              f"{distinct}")
    return results, ok


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--clients", type=int, default=32, help="concurrent clients (a multiple of 4)")
    parser.add_argument("--pairs", type=int, default=50, help="propose + record pairs per client")
    parser.add_argument("--plot", default="bench-out/bench_service.png", help="where the latency plot goes")
    parser.add_argument("--train-ms", type=float, default=0.0,
                        help="pause between propose and record, standing for training (default: none)")
    parser.add_argument("--rate", type=float, default=GOALS["records_per_s"],
                        help="pairs per second offered by all clients together in the paced scenarios, run on "
                             "fresh studies after the closed-loop ones (default: the goal, 300; 0: none)")
    parser.add_argument("--stored-answers", type=int, default=0,
                        help="answers to earlier requests stored in the archive before the load (a service "
                             "that has run for weeks keeps up to 30 days of them; default none)")
    parser.add_argument("--search-process", choices=("both", "child", "in-process"), default="both",
                        help="where the server runs the studies' searches: in a child process (serve "
                             "--search-process), in its own process (--no-search-process), or both, one server "
                             "after the other (default)")
    parser.add_argument("--search-processes", type=int, default=None, metavar="N",
                        help="child processes the searches are spread over (serve --search-processes; default: "
                             "serve's)")
    args = parser.parse_args()
    if args.clients % PROCESSES:
        parser.error(f"--clients must be a multiple of {PROCESSES}")
    folder = Path(tempfile.mkdtemp(prefix="bench-service-"))
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f}; two busy processes of ours "
          f"get {cores_available():.2f} cores together", flush=True)
    row, table = record_paths(100)
    print(f"one trial recorded alone: Archive.record_trial {row * 1000:.1f} ms, a one-row table through "
          f"Archive.add_trials {table * 1000:.1f} ms ({table / row:.1f}x)", flush=True)
    local = baseline_in_process(200)
    print(f"baseline, one process without HTTP: {local * 1000:.2f} ms per propose + record pair "
          f"({1 / local:.0f} records/s)", flush=True)
    cost = proposer_cost(200)
    print("one warm study's search without HTTP, per propose + record (200 pairs): "
          + "; ".join(f"{name}: {thread * 1000:.2f} ms in the calling thread, {total * 1000:.2f} ms in all"
                      for name, (thread, total) in cost.items()), flush=True)
    kinds = ["child", "in-process"] if args.search_process == "both" else [args.search_process]
    seed_archive(folder / "seeded.duckdb")
    if args.stored_answers:
        store_answers(folder / "seeded.duckdb", args.stored_answers)
    results: dict = {}
    ok = True
    ctx = mp.get_context("spawn")
    with ctx.Pool(PROCESSES) as pool:
        pool.map(_warm, range(PROCESSES))
        for kind in kinds:
            path = folder / f"team-{kind}.duckdb"
            shutil.copy(folder / "seeded.duckdb", path)
            options = ("--search-process",) if kind == "child" else ("--no-search-process",)
            if kind == "child" and args.search_processes:
                options += ("--search-processes", str(args.search_processes))
            where = "in child processes" if kind == "child" else "in the server process"
            print(f"\n=== server: warmstart serve {' '.join(options)} (searches {where})", flush=True)
            with ServerProcess(path, log=folder / f"server-{kind}.log", options=options) as server:
                results[kind], passed = load_server(server, args, pool, local)
            ok &= passed
            print(f"two busy processes of ours now get {cores_available():.2f} cores together", flush=True)
    if len(kinds) == 2:
        print("\nside by side (records/s, pair p50 / p99 ms, server CPU per pair with its children / of its "
              "own process):")
        print(f"  {'scenario':<36} {'searches in child processes':>40} {'searches in the server process':>40}")
        for label in results[kinds[0]]:
            cells = []
            for kind in kinds:
                s_ = results[kind][label]
                cpu = ("n/a" if s_["server_cpu_ms"] is None else
                       f"{s_['server_cpu_ms']:.2f} / {s_['own_cpu_ms']:.2f} ms")
                cells.append(f"{s_['records_per_s']:.0f}, {s_['p50_ms']:.0f} / {s_['p99_ms']:.0f} ms, {cpu}")
            print(f"  {label:<36} {cells[0]:>40} {cells[1]:>40}")
        child, own = results["child"], results["in-process"]
        ratios = [child[label]["records_per_s"] / own[label]["records_per_s"] for label in child]
        print(f"  records/s, child over in-process: {min(ratios):.2f}x - {max(ratios):.2f}x")
    plot(results, Path(args.plot))
    print(f"\nplot: {args.plot}")
    shutil.rmtree(folder, ignore_errors=True)
    if not ok:
        sys.exit("a check failed (see above)")


if __name__ == "__main__":
    main()
