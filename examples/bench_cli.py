"""How long everyday commands take, against a bare Python start in the same run.

Goals (issue 17): ``warmstart --version`` <= 0.3 s; ``studies`` and ``show``
<= 0.6 s on the starter archive. Each command runs in a fresh process
``--repeats`` times; the median wall time is printed with its ratio to
``python -c pass`` (the floor no command can go below) and the modules of
note it imported.

Run:  python examples/bench_cli.py [--archive PATH] [--repeats 7]
(without --archive a starter archive is built once in a temporary folder).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HEAVY = ("pandas", "scipy", "sklearn", "numpy", "duckdb", "matplotlib")
CLI = [sys.executable, "-c", "from warmstart.cli import main; main()"]
GOALS = {"--version": 0.3, "studies": 0.6, "show": 0.6}


def _wall(argv: list[str], env: dict, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        subprocess.run(argv, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _heavy_imports(args: list[str], env: dict) -> list[str]:
    code = (
        "import sys\nfrom warmstart.cli import main\n"
        f"try:\n    main({args!r})\nexcept SystemExit:\n    pass\n"
        f"print('HEAVY:' + '|'.join(m for m in {HEAVY!r} if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    line = [s for s in out.stdout.splitlines() if s.startswith("HEAVY:")][-1]
    return [m for m in line[len("HEAVY:"):].split("|") if m]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", help="archive to query (default: a fresh starter archive)")
    parser.add_argument("--repeats", type=int, default=7)
    opts = parser.parse_args()
    env = dict(os.environ)
    tmp = None
    archive = opts.archive
    if archive is None:
        tmp = tempfile.TemporaryDirectory()
        archive = str(Path(tmp.name) / "starter.duckdb")
        print("building a starter archive ...", flush=True)
        subprocess.run([*CLI, "--archive", archive, "init", "--starter"],
                       env=env, check=True, stdout=subprocess.DEVNULL)
    env["WARMSTART_ARCHIVE"] = archive
    load = os.getloadavg()[0]
    floor = _wall([sys.executable, "-c", "pass"], env, opts.repeats)
    print(f"{os.cpu_count()} cores, load average {load:.1f}; median of {opts.repeats} runs each")
    print(f"{'command':<22} {'seconds':>8} {'x pass':>7} {'goal':>6}  heavy modules imported")
    print(f"{'python -c pass':<22} {floor:8.3f} {1.0:7.1f} {'':>6}")
    for args in (["--version"], ["studies"], ["show", "1"], ["--help"]):
        seconds = _wall([*CLI, *args], env, opts.repeats)
        goal = GOALS.get(args[0])
        mark = "" if goal is None else (f"{goal:.1f}" + (" ok" if seconds <= goal else " MISS"))
        heavy = ", ".join(_heavy_imports(args, env)) or "none"
        print(f"{'warmstart ' + ' '.join(args):<22} {seconds:8.3f} {seconds / floor:7.1f} {mark:>6}  {heavy}")
    if tmp is not None:
        tmp.cleanup()


if __name__ == "__main__":
    main()
