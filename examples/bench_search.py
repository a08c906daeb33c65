"""Benchmark: density search against random, Sobol, Nelder-Mead and GP-EI.

Part 1 (quality): mean best-so-far regret at budgets 10/25/50 over 20 seeds
on the published test functions (Branin, Hartmann-6, Rastrigin-4,
Rosenbrock-4; regret = best value - known minimum) and, with ``--real``, on
three datasets bundled with scikit-learn through the built-in cross-validated
learners (regret = 1 - accuracy or 1 - R^2: the error left). Every method
runs in the same process pool in the same run; ratios are a baseline's regret
over the density search's (above 1: the density search is ahead).

Part 2 (speed): median ``propose()`` time of the density search with 100,
1,000 and 5,000 recorded trials in 5 and 20 dimensions, with GP-EI's time
per proposal beside it where it finishes in reasonable time.

Goals (issue 4): best or tied-best at budget 25 on most problems; median
``propose()`` <= 10 ms at 1,000 trials in 20 dimensions.

Run: ``python examples/bench_search.py [--seeds 20] [--real [--real-seeds N]]
[--workers 2] [--plot bench_search.png]``. No invented data is used here.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import math
import statistics
import sys
import time

import numpy as np

from warmstart.search.baselines import GPSearch, NelderMeadSearch, RandomSearch, SobolSearch
from warmstart.cli.progress import Progress
from warmstart.search.density import DensitySearch, run_search
from warmstart.space import Space
from warmstart.search.testfunctions import benchmark_functions

METHODS = {
    "density": DensitySearch,
    "random": RandomSearch,
    "sobol": SobolSearch,
    "nelder-mead": NelderMeadSearch,
    "gp-ei": GPSearch,
}
REAL = {  # dataset bundled with scikit-learn, learner, metric
    "breast_cancer/svm": ("load_breast_cancer", "svm", "accuracy"),
    "wine/knn": ("load_wine", "knn", "accuracy"),
    "diabetes/svm": ("load_diabetes", "svm", "r2"),
}

_PROBLEMS: dict = {}


def problem(name: str):
    """(space, objective, maximize, regret function) of a problem, cached per process."""
    if name not in _PROBLEMS:
        functions = {f.name: f for f in benchmark_functions()}
        if name in functions:
            f = functions[name]
            _PROBLEMS[name] = (f.space, f, False, lambda best, f=f: best - f.minimum)
        else:
            import pandas as pd
            from sklearn import datasets

            from warmstart.evaluate.learners import cv_objective

            loader, learner, metric = REAL[name]
            data = getattr(datasets, loader)(as_frame=True)
            frame = pd.concat([data.data, data.target.rename("target")], axis=1)
            objective = cv_objective(frame, "target", learner, metric=metric, cv=3, seed=0)
            _PROBLEMS[name] = (objective.space, objective, True, lambda best: 1.0 - best)
    return _PROBLEMS[name]


def one_run(job: tuple[str, str, int, int]) -> tuple[str, str, int, np.ndarray]:
    """Best-so-far regret of one search (runs in a worker process)."""
    from threadpoolctl import threadpool_limits

    name, method, seed, budget = job
    space, objective, maximize, regret = problem(name)
    with threadpool_limits(limits=1):
        search = METHODS[method](space, seed=seed, maximize=maximize)
        result = run_search(search, objective, budget)
        if hasattr(search, "close"):
            search.close()
    best = result.best_so_far
    return name, method, seed, np.array([regret(b) if np.isfinite(b) else np.nan for b in best])


def quality(names: list[str], seeds: dict, budgets: list[int], workers: int) -> dict:
    jobs = [(n, m, s, max(budgets)) for n in names for m in METHODS for s in range(seeds[n])]
    runs: dict = {}
    progress = Progress("searches")
    with cf.ProcessPoolExecutor(max_workers=workers) as pool:
        futures = [pool.submit(one_run, job) for job in jobs]
        for done, fut in enumerate(cf.as_completed(futures), start=1):
            name, method, seed, curve = fut.result()
            runs.setdefault(name, {}).setdefault(method, {})[seed] = curve
            progress(done, len(jobs))
    return {n: {m: np.array([runs[n][m][s] for s in range(seeds[n])]) for m in METHODS} for n in names}


def print_quality(curves: dict, budgets: list[int]) -> None:
    from scipy.stats import mannwhitneyu

    methods = list(METHODS)
    head = f"{'problem':<18}{'budget':>6} " + "".join(f"{m:>17}" for m in methods)
    print("\nMean best-so-far regret (lower is better); in brackets: regret / density's")
    print(head)
    print("-" * len(head))
    verdicts = []
    for name, by_method in curves.items():
        for b in budgets:
            means = {m: float(np.nanmean(by_method[m][:, b - 1])) for m in methods}
            cells = []
            for m in methods:
                ratio = means[m] / means["density"] if means["density"] > 0 else math.inf
                cells.append(f"{means[m]:.4g}" if m == "density" else f"{means[m]:.3g} ({ratio:.2f})")
            print(f"{name:<18}{b:>6} " + "".join(f"{c:>17}" for c in cells))
        b = 25 if 25 in budgets else budgets[len(budgets) // 2]
        means = {m: float(np.nanmean(by_method[m][:, b - 1])) for m in methods}
        best = min(means, key=means.get)
        if best == "density":
            verdict = "best"
        else:
            p = mannwhitneyu(by_method["density"][:, b - 1], by_method[best][:, b - 1],
                             alternative="greater").pvalue
            verdict = f"tied-best (vs {best}, p={p:.2f})" if p > 0.05 else f"behind {best} (p={p:.3f})"
        verdicts.append((name, verdict))
    print(f"\nDensity search at budget {b} (tied-best: not worse than the best method by a "
          "one-sided Mann-Whitney test at 5 %):")
    for name, verdict in verdicts:
        print(f"  {name:<20} {verdict}")
    wins = sum(v.startswith(("best", "tied")) for _, v in verdicts)
    print(f"  best or tied-best on {wins} of {len(verdicts)} problems")


def plot_quality(curves: dict, path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(curves)
    cols = min(n, 4)
    rows = math.ceil(n / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(4 * cols, 3.2 * rows), squeeze=False)
    for ax, (name, by_method) in zip(axes.ravel(), curves.items()):
        for m, runs in by_method.items():
            ax.plot(np.arange(1, runs.shape[1] + 1), np.nanmean(runs, axis=0), label=m)
        ax.set_yscale("log")
        ax.set_title(name)
        ax.set_xlabel("trials")
        ax.set_ylabel("mean best regret")
    for ax in axes.ravel()[n:]:
        ax.axis("off")
    axes[0, 0].legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    print(f"\nplot written to {path}")


def latency(sizes: list[int], dims: list[int], gp_max: int) -> None:
    from threadpoolctl import threadpool_limits

    print("\npropose() latency, median over 20 proposals (GP-EI: over 3), with n recorded trials")
    print(f"{'dims':>5}{'trials':>8}{'density ms':>12}{'gp-ei ms':>12}{'ratio':>8}")
    for d in dims:
        space = Space.from_dict({"params": {f"x{i}": {"type": "real", "low": 0.0, "high": 1.0}
                                            for i in range(d)}})
        for n in sizes:
            rng = np.random.default_rng(0)
            configs = space.sample(n, rng)
            scores = [-sum((v - 0.3) ** 2 for v in c.values()) for c in configs]
            times = {}
            for label, cls, reps in (("density", DensitySearch, 20), ("gp", GPSearch, 3)):
                if label == "gp" and n > gp_max:
                    continue
                search = cls(space, seed=0)
                for c, s in zip(configs, scores):
                    search.record(c, s)
                ts = []
                with threadpool_limits(limits=1):
                    for _ in range(reps):
                        t0 = time.perf_counter()
                        c = search.propose()
                        ts.append(time.perf_counter() - t0)
                        search.record(c, -sum((v - 0.3) ** 2 for v in c.values()))
                times[label] = 1e3 * statistics.median(ts)
            gp = times.get("gp")
            gp_text = f"{gp:12.1f}" if gp is not None else f"{'not run':>12}"
            ratio = f"{gp / times['density']:8.0f}" if gp is not None else f"{'':>8}"
            print(f"{d:>5}{n:>8}{times['density']:12.2f}{gp_text}{ratio}", flush=True)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--budgets", default="10,25,50")
    ap.add_argument("--real", action="store_true", help="also run three scikit-learn datasets")
    ap.add_argument("--real-seeds", type=int, default=None,
                    help="seeds of the real-data problems (default: --seeds)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--plot", default="bench_search.png", help="PNG of the best-so-far curves")
    ap.add_argument("--skip-quality", action="store_true")
    ap.add_argument("--skip-latency", action="store_true")
    ap.add_argument("--gp-max-trials", type=int, default=1000,
                    help="largest history GP-EI is timed on (its fit is cubic)")
    args = ap.parse_args(argv)
    budgets = [int(b) for b in args.budgets.split(",")]
    if not args.skip_quality:
        seeds = {f.name: args.seeds for f in benchmark_functions()}
        if args.real:
            seeds.update({name: args.real_seeds or args.seeds for name in REAL})
        t0 = time.perf_counter()
        curves = quality(list(seeds), seeds, budgets, args.workers)
        print(f"\n{len(seeds)} problems x {len(METHODS)} methods (seeds: "
              f"{', '.join(f'{n} {k}' for n, k in seeds.items())}) in "
              f"{time.perf_counter() - t0:.0f} s", file=sys.stderr)
        print_quality(curves, budgets)
        if args.plot:
            plot_quality(curves, args.plot)
    if not args.skip_latency:
        latency([100, 1000, 5000], [5, 20], args.gp_max_trials)


if __name__ == "__main__":
    main()
