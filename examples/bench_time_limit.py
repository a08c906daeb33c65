"""Benchmark: what a per-trial time limit costs, and how promptly it stops a trial.

A time limit makes the cross-validated objective run each trial in a child
process that can be stopped (``warmstart.evaluate.deadline``). This prints

1. the time of the same 20 knn configs (5-fold CV on scikit-learn's bundled
   iris data) without a limit (in this process) and with a generous limit
   (in a child process), per trial and as a ratio, plus the first trial's
   start of the child process and the start of a new child after a stop;
2. a config whose single fold runs for many seconds (an ``mlp`` with two
   layers of 256 units on 5,000 rows of ``make_classification``) under a
   1 s limit: how long the call took and what it recorded.

Benchmarks print figures; no figure here is asserted anywhere. Run with
``python examples/bench_time_limit.py [--trials 20] [--repeats 3]``. No
invented data is used here.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import pandas as pd
from sklearn.datasets import load_iris, make_classification

from warmstart.evaluate.learners import cv_objective, default_space

SLOW_MLP = {"n_layers": 2, "width_1": 256, "width_2": 256, "activation": "relu", "alpha": 1e-6,
            "learning_rate_init": 1e-3}


def _row(label: str, value: str) -> None:
    print(f"  {label:<52} {value}")


def _timed(objective, configs) -> tuple[float, list]:
    started = time.perf_counter()
    results = [objective(c) for c in configs]
    return time.perf_counter() - started, results


def overhead(trial_count: int, repeats: int) -> None:
    iris = load_iris(as_frame=True).frame
    configs = default_space("knn", "classification").sample(trial_count, rng=np.random.default_rng(0))
    plain = cv_objective(iris, "target", "knn", cv=5, seed=0)
    limited = cv_objective(iris, "target", "knn", cv=5, seed=0, time_limit=300)
    plain(configs[0])  # imports and first-call costs out of the figures
    started = time.perf_counter()
    limited(configs[0])  # starts the child process (the fork server too, the first time)
    start_s = time.perf_counter() - started
    without, with_limit = [], []
    for _ in range(repeats):  # alternate, so load changes on a shared machine hit both
        seconds, plain_results = _timed(plain, configs)
        without.append(seconds)
        seconds, limited_results = _timed(limited, configs)
        with_limit.append(seconds)
    same = all(a.score == b.score for a, b in zip(plain_results, limited_results))
    limited.close()
    started = time.perf_counter()
    limited(configs[0])  # a new child from the running fork server: what a stopped trial costs the next one
    restart_s = time.perf_counter() - started
    limited.close()
    a, b = statistics.median(without), statistics.median(with_limit)
    print(f"{trial_count} knn trials on iris (5-fold CV), median of {repeats} runs")
    _row("without a limit (this process)", f"{a:7.3f} s  {1000 * a / trial_count:7.2f} ms/trial")
    _row("with a limit (child process)", f"{b:7.3f} s  {1000 * b / trial_count:7.2f} ms/trial")
    _row("ratio with/without", f"{b / a:7.2f}")
    _row("extra per trial", f"{1000 * (b - a) / trial_count:7.2f} ms")
    _row("first trial: fork server and child process start", f"{start_s:7.3f} s")
    _row("first trial after a stop: a new child process", f"{restart_s:7.3f} s")
    _row("same scores with and without", str(same))

def stop_promptly(limit: float) -> None:
    X, y = make_classification(n_samples=5000, n_features=20, flip_y=0.2, random_state=0)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(20)]).assign(target=y)
    objective = cv_objective(frame, "target", "mlp", cv=5, seed=0, time_limit=limit)
    started = time.perf_counter()
    result = objective(SLOW_MLP)
    seconds = time.perf_counter() - started
    objective.close()
    print(f"\nmlp 256x256 on 5,000 rows under a {limit:g} s limit")
    _row("call returned after (with a child process start)", f"{seconds:7.3f} s")
    _row("cost_s: config sent until the child was joined", f"{result.cost_s:7.3f} s "
         f"({result.cost_s - limit:+.3f} s past the limit)")
    _row("recorded", f"{result.status}: {result.error}")

def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=20)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--limit", type=float, default=1.0)
    args = parser.parse_args()
    overhead(args.trials, args.repeats)
    stop_promptly(args.limit)


if __name__ == "__main__":  # the child processes import this file: keep the work under the guard
    main()
