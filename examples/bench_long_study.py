"""Benchmark: a long warm study, its cost per trial and its regret.

A team's service can hold one study for thousands of trials (many workers,
cheap training). This runs the warm search (:class:`MixtureSearch`) alone,
without HTTP or archive, on published test functions (Branin, Hartmann-6,
Rastrigin-4; regret = best value - known minimum), each warm-started from one
past study of 64 Sobol points of the same function, for ``--trials`` trials
asked in batches of ``--batch`` (as the service asks: a batch's results, then
its proposals, the pending ones joining the search's model).

Printed per variant and function: the mean regret over ``--seeds`` seeds at
100, 300 and the last trial count, and the time per propose + record pair
over the first and the last third of the trials. Variants: ``default`` (the
caps ``max_good=64``, ``max_rest=256`` on the study's own densities) and
``uncapped`` (no caps), run in the same process, back to back.

Run::

    python examples/bench_long_study.py                  # 10 seeds, 900 trials, batches of 8
    python examples/bench_long_study.py --seeds 3 --trials 300 --variants default

To measure an earlier commit, put its checkout first on the path
(``PYTHONPATH=/path/to/checkout python examples/bench_long_study.py --variants
default``).
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from threadpoolctl import threadpool_limits

from warmstart.prior import Source, prior_from_sources, within_study_quantiles
from warmstart.search.mixture import MixtureSearch
from warmstart.search.testfunctions import benchmark_functions

FUNCTIONS = ("branin", "hartmann6", "rastrigin4")
VARIANTS = {"default": {}, "uncapped": {"max_good": 10**9, "max_rest": 10**9}}


def one_run(f, seed: int, trials: int, batch: int, options: dict) -> tuple[dict[int, float], list[float]]:
    """Regret at each trial count and the seconds of each pair, for one seed."""
    space = f.space
    X = space.sobol_unit(64, 100 + seed)  # the past study: 64 Sobol points of the same function
    y = np.array([f(c) for c in space.decode(X)])
    source = Source(1, 1, "past study", X, within_study_quantiles(y, maximize=False),
                    numbers=np.arange(64), clipped=np.zeros(64, dtype=bool))
    search = MixtureSearch(space, prior_from_sources(space, [source]), seed=seed, maximize=False, **options)
    regret, seconds = {}, []
    while search.trial_count < trials:
        t0 = time.perf_counter()
        configs = search.propose(min(batch, trials - search.trial_count))
        for config in configs:
            search.record(config, f(config))
            regret[search.trial_count] = search.best.score - f.minimum
        seconds += [(time.perf_counter() - t0) / len(configs)] * len(configs)
    return regret, seconds


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument("--trials", type=int, default=900)
    ap.add_argument("--batch", type=int, default=8, help="proposals asked together (default 8)")
    ap.add_argument("--variants", default="default,uncapped", help=f"comma-separated, of {', '.join(VARIANTS)}")
    args = ap.parse_args()
    variants = [v.strip() for v in args.variants.split(",") if v.strip()]
    unknown = [v for v in variants if v not in VARIANTS]
    if unknown:
        ap.error(f"--variants: unknown {', '.join(unknown)}; choose from {', '.join(VARIANTS)}")
    marks = sorted({m for m in (100, 300, args.trials) if m <= args.trials})
    functions = {f.name: f for f in benchmark_functions()}
    third = max(1, args.trials // 3)
    print(f"{args.seeds} seeds, {args.trials} trials in batches of {args.batch}; mean regret at "
          f"{', '.join(map(str, marks))} trials; ms per propose + record pair over the first / last third")
    with threadpool_limits(limits=1, user_api="blas"):
        for name in FUNCTIONS:
            f = functions[name]
            for variant in variants:
                regrets = {m: [] for m in marks}
                first, last = [], []
                for seed in range(args.seeds):
                    regret, seconds = one_run(f, seed, args.trials, args.batch, VARIANTS[variant])
                    for m in marks:
                        regrets[m].append(regret[m])
                    first += seconds[:third]
                    last += seconds[-third:]
                cells = "  ".join(f"@{m}: {np.mean(regrets[m]):.4g}" for m in marks)
                print(f"{name:<11} {variant:<9} regret {cells}   ms/pair {np.mean(first) * 1000:.2f} / "
                      f"{np.mean(last) * 1000:.2f}", flush=True)


if __name__ == "__main__":
    main()
