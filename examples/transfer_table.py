"""Tables (and a plot) of issue 18's measurements from transfer_study.py logs.

Reads the JSON lines ``examples/transfer_study.py --log FILE`` appended and
prints, for the chosen runs, one row per learner and replay for each half of
the starter tasks (``design``, ``holdout``, ``all``), every figure recomputed
from the per-task rows of that half:

* gain of warm over cold pooled over the half's tasks, and the target of
  issue 18 (75 % of the hindsight room under the nearest replay:
  svm +1.06, knn +1.29, gbt +1.11, forest +0.90) with the distance to it;
* point-estimate losses (share of tasks with gain < 0), win/tie/loss with a
  0.1-bit region of practical equivalence, significant losses (Wilcoxon over
  runs, Holm's correction within the half);
* bits over uniform of warm, the seed list, the average-rank list and the
  nearest datasets' list, and warm minus the better static list;
* the gain of the seed list (the warm search before issue 18).

Run::

    python examples/transfer_table.py /tmp/trlog/final.jsonl --repeats 30 --budget 10 \\
        --variant v3 --plot docs/issue18_gain.png
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np

from warmstart.gain.verdicts import verdicts

#: Issue 18's targets: 75 % of the hindsight room, nearest replay, budget 10 (bits).
TARGETS = {"svm": 1.06, "knn": 1.29, "gbt": 1.11, "forest": 0.90}


def figures(tasks: list[dict]) -> dict:
    p = np.mean([t["p"] for t in tasks])
    q = {k: np.mean([t[f"q_{k}"] for t in tasks]) for k in
         ("warm", "cold", "seedlist", "defaults", "nearest", "best_past_task")}
    v = verdicts([t["task"] for t in tasks], [t["gain"] for t in tasks], [t["p_value"] for t in tasks])
    bits = {k: math.log2(v_ / p) for k, v_ in q.items()}
    return {
        "n": len(tasks), "gain": math.log2(q["warm"] / q["cold"]),
        "hurt": float(np.mean([t["gain"] < 0 for t in tasks])),
        "wtl": f"{v.wins}/{v.ties}/{v.losses}", "sig": v.significant_losses,
        "loss_ci": f"{v.share_loss_low:.0%}-{v.share_loss_high:.0%}",
        "bits": bits, "above_static": bits["warm"] - max(bits["defaults"], bits["nearest"]),
        "gain_list": math.log2(q["seedlist"] / q["cold"]),
        "hurt_list": float(np.mean([t["q_seedlist"] < t["q_cold"] for t in tasks])),
        "room": math.log2(q["best_past_task"] / q["cold"]),
    }


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("log", type=Path)
    ap.add_argument("--variant", default=None)
    ap.add_argument("--repeats", type=int, default=None)
    ap.add_argument("--budget", type=int, default=None)
    ap.add_argument("--half", default="all", help="which --half the runs were made with")
    ap.add_argument("--plot", type=Path)
    args = ap.parse_args(argv)
    rows = [json.loads(line) for line in args.log.read_text().splitlines() if line.strip()]
    runs = {}
    for r in rows:
        if ((args.variant is None or r["variant"] == args.variant) and (args.repeats is None or r["repeats"] == args.repeats)
                and (args.budget is None or r["budget"] == args.budget) and r["half"] == args.half and "--set" not in r["argv"]):
            runs[(r["learner"], r["replay"], r["budget"])] = r  # the latest run of each
    print(f"{'learner':7} {'replay':9} {'B':>3} {'half':8} {'n':>3} {'gain':>6} {'target':>7} {'dist':>6} "
          f"{'hurt':>5} {'w/t/l':>8} {'loss 95%':>9} {'sig':>3} | {'warm':>5} {'list':>5} {'avg':>5} {'near':>5} "
          f"{'+stat':>6} | {'g_list':>6} {'hurt':>5} {'room':>5}")
    table = {}
    for (learner, replay, budget), r in sorted(runs.items()):
        for half in ("design", "holdout", "all"):
            tasks = [t for t in r["tasks"] if half == "all" or t["half"] == half]
            if not tasks:
                continue
            f = figures(tasks)
            table[(learner, replay, budget, half)] = f
            target = TARGETS.get(learner) if replay == "nearest" and budget == 10 else None
            tgt = f"{target:+7.2f}" if target else f"{'':>7}"
            dist = f"{f['gain'] - target:+6.2f}" if target else f"{'':>6}"
            b = f["bits"]
            print(f"{learner:7} {replay:9} {budget:3d} {half:8} {f['n']:3d} {f['gain']:+6.2f} {tgt} {dist} "
                  f"{f['hurt']:5.2f} {f['wtl']:>8} {f['loss_ci']:>9} {f['sig']:3d} | {b['warm']:5.2f} "
                  f"{b['seedlist']:5.2f} {b['defaults']:5.2f} {b['nearest']:5.2f} {f['above_static']:+6.2f} | "
                  f"{f['gain_list']:+6.2f} {f['hurt_list']:5.2f} {f['room']:+5.2f}")
    if args.plot and table:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        keys = sorted({(l, rp, b) for l, rp, b, h in table})
        fig, ax = plt.subplots(figsize=(max(6, 1.1 * len(keys)), 4))
        x = np.arange(len(keys))
        for k, (label, field, color) in enumerate((("mixture (warm)", "gain", "#d9480f"),
                                                   ("seed list (before)", "gain_list", "#868e96"),
                                                   ("hindsight room", "room", "#1c7ed6"))):
            ax.bar(x + (k - 1) * 0.27, [table[(*key, "all")][field] for key in keys], 0.27, label=label, color=color)
        for i, (learner, replay, budget) in enumerate(keys):
            if replay == "nearest" and budget == 10 and learner in TARGETS:
                ax.plot([i - 0.4, i + 0.4], [TARGETS[learner]] * 2, color="black", lw=1.5)
        ax.set_xticks(x)
        ax.set_xticklabels([f"{l}\n{rp}\nB={b}" for l, rp, b in keys], fontsize=8)
        ax.set_ylabel("gain over cold (bits, pooled over 57 tasks)")
        ax.set_title("Issue 18: warm over cold on the starter history (black: target, nearest replay, B=10)")
        ax.axhline(0, color="black", lw=0.6)
        ax.legend(fontsize=8)
        fig.savefig(args.plot, dpi=110, bbox_inches="tight")
        print(f"plot written to {args.plot}")


if __name__ == "__main__":
    main()
