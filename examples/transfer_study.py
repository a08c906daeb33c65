"""Design study of warm strategies on the starter history (issue 18).

Replays, leave-one-task-out, a chosen warm strategy on one half of the
starter tasks (split by a hash of the task name, fixed once: ``design`` is
where variants are chosen, ``holdout`` is reported once at the end) and
prints, per learner:

* pooled gain of warm over cold, ``log2(mean q_warm / mean q_cold)``;
* the share of tasks whose point gain is below 0;
* pooled bits over uniform of warm, cold, the ranked seed list
  (``DensitySearch`` with a prior, the search issue 18 replaces), the static
  baselines (average-rank list, nearest datasets' best configs) and the
  hindsight list (``best_past_task``).

It uses the library's replay pieces (``replay_tasks``, ``static_order``,
``hindsight_rates``, ``compare``, ``pool``) and runs every search through
``run_search``. Cold and seed-list runs do not depend on the variant and
are cached in ``--cache`` (default ``/tmp/warmstart_transfer_cache``).

Run, for instance::

    PYTHONPATH=$PWD python examples/transfer_study.py --archive /tmp/tr_arch.duckdb \\
        --learner svm --replay nearest --budget 10 --repeats 10 --half design \\
        --variant default --log /tmp/transfer_log.jsonl

``--set key=value`` overrides one option of :class:`MixtureSearch` (JSON
values). The archive must hold the starter history
(``warmstart --archive PATH init --starter``). No invented data is used.
"""

from __future__ import annotations

import argparse
import datetime
import hashlib
import json
import math
import sys
import time
from pathlib import Path

import numpy as np

from warmstart.archive import Archive
from warmstart.archive.sources import load_sources, prior_info, prior_sources
from warmstart.gain.bits import Runs, compare, in_target, pool
from warmstart.gain.replay import hindsight_rates, replay_tasks
from warmstart.gain.verdicts import paired_runs_p, verdicts
from warmstart.prior import prior_from_sources
from warmstart.cli.progress import Progress
from warmstart.search.density import DensitySearch
from warmstart.search.mixture import MixtureSearch
from warmstart.search.static import average_rank_list, nearest_tasks_list
from warmstart.search.strategy import run_search

#: Named variants of the mixture search (options of MixtureSearch); every one measured is
#: recorded in docs/experiments.md.
VARIANTS: dict[str, dict] = {
    "default": {},  # the defaults of MixtureSearch as committed
    # the first design, spelled out so later changes of the defaults do not change what it means
    "v1": {"gamma": 0.25, "source_gamma": 0.15, "n_hedge": 3, "cover_fraction": 0.1, "own_strength": 10.0,
           "uniform": 0.1, "n_candidates": 24, "n_boot": 256, "max_ranked": 40, "prior_power": 0.0,
           "source_score": "ratio", "shrink": 1.0, "explore": 0.1, "cover": "top", "exact_share": 0.0,
           "cover_pool": 1.0, "adaptive_design": False},
    # the defaults chosen on the design half (issue 18): no hedge, half the candidates from past
    # tasks are their good configs as they are; the space-filling query is the second
    "v2": {"gamma": 0.25, "source_gamma": 0.15, "n_hedge": 0, "cover_fraction": 0.1, "own_strength": 10.0,
           "uniform": 0.1, "n_candidates": 24, "n_boot": 256, "max_ranked": 40, "prior_power": 0.0,
           "source_score": "ratio", "shrink": 1.0, "explore": 0.1, "cover": "top", "exact_share": 0.5,
           "cover_pool": 1.0, "adaptive_design": False},
    # v2 and, when no past task orders the scores better than chance, the Sobol start of a cold search
    "v3": {"gamma": 0.25, "source_gamma": 0.15, "n_hedge": 0, "cover_fraction": 0.1, "own_strength": 10.0,
           "uniform": 0.1, "n_candidates": 24, "n_boot": 256, "max_ranked": 40, "prior_power": 0.0,
           "source_score": "ratio", "shrink": 1.0, "explore": 0.1, "cover": "top", "exact_share": 0.5,
           "cover_pool": 1.0, "adaptive_design": True},
}


def half_of(task: str) -> str:
    """``design`` or ``holdout``: the first byte of SHA-256 of the task name, even or odd."""
    return "design" if hashlib.sha256(task.encode()).digest()[0] % 2 == 0 else "holdout"


def log2_ratio(a: float, b: float) -> float:
    """``log2(a / b)``, or NaN when either rate is 0 (a list with no hit on any task of a small
    run: its pooled bits are undefined, and printed as nan rather than stopping the run)."""
    return math.log2(a / b) if a > 0 and b > 0 else math.nan


def run_hits(task, make, budget: int, repeats: int, seed: int) -> np.ndarray:
    """Hit matrix (repeats, budget) of a strategy factory on a replay task."""
    hits = np.zeros((repeats, budget), dtype=bool)
    for r in range(repeats):
        result = run_search(make(seed + r), task.objective.new_run(budget), budget)  # a fresh evaluator per run
        hits[r] = in_target(result.scores, task.threshold, task.objective.maximize)
    return hits


def cached_hits(cache: Path, key: dict, compute) -> np.ndarray:
    name = hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:20]
    path = cache / f"{name}.npy"
    if path.exists():
        return np.load(path)
    hits = compute()
    cache.mkdir(parents=True, exist_ok=True)
    np.save(path, hits)
    return hits


def study_learner(archive, learner: str, args, options: dict, progress) -> dict:
    tasks = [t for t in replay_tasks(archive, learner, objective=args.replay)
             if args.half == "all" or half_of(t.task) == args.half]
    if args.task:
        tasks = [t for t in tasks if t.task in set(args.task)]
    cache: dict = {}
    gains, per_task, curves, p_values = [], [], {"warm": [], "cold": [], "seedlist": []}, []
    t0 = time.perf_counter()
    for i, task in enumerate(tasks):
        key = task.space.content_hash
        if key not in cache:
            cache[key] = load_sources(archive, learner, task.space)
        weighted = prior_sources(archive, task.profile, learner, task.space, exclude_tasks=[task.task_id],
                                 loaded=cache[key])
        prior = prior_from_sources(task.space, weighted, provenance={**prior_info(learner), "held_out": task.task})
        mx = task.objective.maximize
        base = {"learner": learner, "task": task.task, "replay": args.replay, "budget": args.budget,
                "repeats": args.repeats, "seed": args.seed,
                "rule": "each recorded config once per run"}  # cached runs of the former replay rule are stale
        cold = cached_hits(args.cache, {**base, "search": "cold"}, lambda: run_hits(
            task, lambda s: DensitySearch(task.space, prior=None, seed=s, maximize=mx),
            args.budget, args.repeats, args.seed))
        # the seed list depends on the similarity (one kernel since the restructure of issue 15)
        seedlist = cached_hits(args.cache, {**base, "search": "seedlist", "similarity": 2}, lambda: run_hits(
            task, lambda s: DensitySearch(task.space, prior=prior, seed=s, maximize=mx),
            args.budget, args.repeats, args.seed))
        warm = run_hits(task, lambda s: MixtureSearch(task.space, prior, seed=s, maximize=mx, **options),
                        args.budget, args.repeats, args.seed)
        for label, h in (("warm", warm), ("cold", cold), ("seedlist", seedlist)):
            curves[label].append(h.mean(axis=0))
        others = {"seedlist": Runs(seedlist)}
        for label, make_list in (("defaults", average_rank_list), ("nearest", nearest_tasks_list)):
            configs = make_list(prior, args.budget)
            h = in_target(task.objective.new_run(len(configs)).values(task.space.encode(configs)), task.threshold, mx)
            others[label] = Runs(np.pad(h, (0, args.budget - len(h)))[None, :])
        result = compare(task.task, Runs(warm), Runs(cold), task.p, rng=args.seed, others=others)
        p_values.append(paired_runs_p(warm, cold))
        for label, q in hindsight_rates(task, prior, args.budget).items():
            result.extra[f"q_{label}"] = q
        gains.append(result)
        per_task.append({"task": task.task, "half": half_of(task.task), "gain": result.gain, "p": task.p,
                         "q_warm": result.q_warm, "q_cold": result.q_cold, "p_value": p_values[-1],
                         **{f"q_{k}": result.extra[f"q_{k}"]
                            for k in ("seedlist", "defaults", "nearest", "best_past_task")}})
        progress(i + 1, len(tasks))
    pooled = pool(gains, rng=args.seed)
    v = verdicts([g.task for g in gains], [g.gain for g in gains], p_values)
    p = np.mean([g.p for g in gains])
    q = {label: float(np.mean([g.extra[f"q_{label}"] for g in gains]))
         for label in ("seedlist", "defaults", "nearest", "best_past_task")}
    return {
        "learner": learner, "n_tasks": len(gains), "gain": pooled.gain, "gain_low": pooled.gain_low,
        "gain_high": pooled.gain_high, "share_hurt": pooled.share_hurt, "bits_warm": pooled.bits_warm,
        "bits_cold": pooled.bits_cold, **{f"bits_{k}": log2_ratio(v, p) for k, v in q.items()},
        "room": log2_ratio(q["best_past_task"], np.mean([g.q_cold for g in gains])),
        "gain_seedlist": log2_ratio(q["seedlist"], np.mean([g.q_cold for g in gains])),
        "share_hurt_seedlist": float(np.mean([g.extra["q_seedlist"] < g.q_cold for g in gains])),
        "seconds": time.perf_counter() - t0, "tasks": per_task,
        "wins": v.wins, "ties": v.ties, "losses": v.losses, "share_loss_low": v.share_loss_low,
        "share_loss_high": v.share_loss_high, "significant_losses": v.significant_losses,
        "curves": {k: np.mean(v, axis=0).round(3).tolist() for k, v in curves.items()},
    }


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--archive", required=True)
    ap.add_argument("--learner", action="append", default=None)
    ap.add_argument("--replay", choices=["nearest", "surrogate"], default="nearest")
    ap.add_argument("--budget", type=int, default=10)
    ap.add_argument("--repeats", type=int, default=10)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--half", choices=["design", "holdout", "all"], default="design")
    ap.add_argument("--task", action="append", default=None, help="only these tasks (within the half)")
    ap.add_argument("--variant", default="default", choices=sorted(VARIANTS))
    ap.add_argument("--set", action="append", default=[], metavar="KEY=JSON", help="override one option")
    ap.add_argument("--cache", type=Path, default=Path("/tmp/warmstart_transfer_cache"))
    ap.add_argument("--log", type=Path, help="append one JSON line per learner here")
    ap.add_argument("--curves", action="store_true", help="print the hit rate at every query position")
    args = ap.parse_args(argv)
    options = dict(VARIANTS[args.variant])
    for item in args.set:
        k, _, v = item.partition("=")
        options[k] = json.loads(v)
    archive = Archive(args.archive, read_only=True)
    learners = args.learner or ["svm", "knn", "gbt", "forest"]
    print(f"variant {args.variant} {json.dumps(options)}; {args.half} half; replay {args.replay}; "
          f"budget {args.budget}; {args.repeats} runs", flush=True)
    print(f"{'learner':8} {'tasks':>5} {'gain':>6} {'95%':>14} {'hurt':>5} | {'warm':>5} {'cold':>5} "
          f"{'list':>5} {'avg':>5} {'near':>5} {'room':>5} | {'g_list':>6} {'hurt':>5}  s", flush=True)
    for learner in learners:
        r = study_learner(archive, learner, args, options, Progress(f"{learner}"))
        print(f"{learner:8} {r['n_tasks']:5d} {r['gain']:+6.2f} {r['gain_low']:+6.2f}..{r['gain_high']:+5.2f} "
              f"{r['share_hurt']:5.2f} | {r['bits_warm']:5.2f} {r['bits_cold']:5.2f} {r['bits_seedlist']:5.2f} "
              f"{r['bits_defaults']:5.2f} {r['bits_nearest']:5.2f} {r['room']:+5.2f} | "
              f"{r['gain_seedlist']:+6.2f} {r['share_hurt_seedlist']:5.2f} {r['seconds']:4.0f}", flush=True)
        print(f"   {r['wins']}/{r['ties']}/{r['losses']} win/tie/loss (+-0.1 bit), losses "
              f"{r['losses'] / r['n_tasks']:.0%} (95% {r['share_loss_low']:.0%} to {r['share_loss_high']:.0%}), "
              f"significant losses (Holm) {r['significant_losses']}", flush=True)
        if args.curves:
            for label, c in r["curves"].items():
                print(f"   hit rate per query, {label:8}: " + " ".join(f"{v:.2f}" for v in c), flush=True)
        if args.log:
            with open(args.log, "a", encoding="utf-8") as fh:
                fh.write(json.dumps({"date": datetime.date.today().isoformat(), "variant": args.variant,
                                     "options": options, "half": args.half, "replay": args.replay,
                                     "budget": args.budget, "repeats": args.repeats, "seed": args.seed,
                                     "argv": sys.argv[1:], **r}) + "\n")


if __name__ == "__main__":
    main()
