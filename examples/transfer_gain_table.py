"""Issue 18's final table from ``warmstart gain --json`` outputs (and a plot).

``warmstart gain --json`` (leave-one-task-out replay) writes, per learner and
budget, the pooled figures and one row per held-out task (hit rates of warm,
cold, the library default then cold, the average-rank list, the nearest
datasets' list, the hindsight list, and the paired p-value over runs). This
script reads those files and prints, for each learner, replay and budget,
three rows: every task, the *design* half and the *holdout* half (the split
of ``examples/transfer_study.py``: first byte of SHA-256 of the task name,
even or odd). Every figure of a half is recomputed from its own task rows
with the library's :func:`~warmstart.gain.bits.pool` (so Holm's correction
runs within the half):

* pooled gain of warm over cold with its 95 % bootstrap interval over tasks,
  the share of the hindsight room it closes, issue 18's target (75 % of the
  room under the nearest replay at budget 10) and the distance to it;
* hurt share (point estimate), significant losses (Wilcoxon over runs,
  Holm), win/tie/loss with a 0.1-bit region of practical equivalence, the
  share of losses with its Wilson 95 % interval;
* warm minus the average-rank list and minus the nearest datasets' list;
* the library's default then a cold search: its bits, warm minus it, and the
  share of tasks where warm's hit rate is above it.

With ``--control FILE`` (outputs of ``gain --permuted --json``) it prints the
permuted-score control: pooled bits over uniform of every search with a
bootstrap interval over tasks (:func:`~warmstart.gain.control.pooled_bits_interval`)
and the share of tasks with at least 1 and 2 bits against ``2**-b`` (marked
ABOVE only when a one-sided binomial test over the tasks rejects ``2**-b`` at
the 1 % level).

The runs per search are read from the ``repeats`` that ``gain --json``
records (the file name, ``..._r30_...``, only for files written before).

Run (the files of docs/experiments.md, 2026-12-03, "issue 18: the measured table")::

    PYTHONPATH=$PWD python examples/transfer_gain_table.py /tmp/t2/runs/b*_r30_*.json \\
        --control /tmp/t2/runs/perm_*.json --plot docs/issue18_final.png

The starter history is real data (published open datasets, see
``archive/starter``); no invented data is used here.
"""

from __future__ import annotations

import argparse
import dataclasses
import hashlib
import json
import math
import re
from pathlib import Path

import numpy as np

from warmstart.gain.bits import TaskGain, pool
from warmstart.gain.control import markov_bound, pooled_bits_interval, share_at_least

#: Issue 18's targets: 75 % of the hindsight room, nearest replay, budget 10 (bits).
TARGETS = {"svm": 1.06, "knn": 1.29, "gbt": 1.11, "forest": 0.90}
LEARNERS = ("svm", "knn", "gbt", "forest")
_FIELDS = [f.name for f in dataclasses.fields(TaskGain) if f.name != "extra"]


def half_of(task: str) -> str:
    """``design`` or ``holdout`` (as in examples/transfer_study.py)."""
    return "design" if hashlib.sha256(task.encode()).digest()[0] % 2 == 0 else "holdout"


def _number(v):
    return float("nan") if v is None else v


#: searches run ``repeats`` times; the static lists once
_RUN_ONCE = ("defaults", "nearest")


def _unsmoothed(q: float, n_queries: int) -> float:
    """0 where ``q`` is the Jeffreys-smoothed rate of ``n_queries`` misses, else ``q``.

    Files written before the pooled figures used unsmoothed rates (2026-12-03)
    carry smoothed per-task rates; a real rate ``k / n`` never equals
    ``0.5 / (n + 1)``, so newer files pass through unchanged.
    """
    return 0.0 if math.isclose(q, 0.5 / (n_queries + 1), rel_tol=1e-9) else q


def task_gain(row: dict, repeats: int, budget: int) -> TaskGain:
    """A per-task row of ``gain --json`` back as a :class:`TaskGain` (rates of the others unsmoothed)."""
    core = {k: _number(row[k]) for k in _FIELDS}
    extra = {k: _number(v) for k, v in row.items() if k not in _FIELDS and k != "learner"}
    for k in list(extra):
        if k.startswith("q_") and k[2:] not in ("best_past_task", "ideal_list"):
            extra[k] = _unsmoothed(extra[k], budget * (1 if k[2:] in _RUN_ONCE else repeats))
    extra.setdefault("raw_q_warm", _unsmoothed(core["q_warm"], budget * repeats))
    return TaskGain(**core, extra=extra)


def _repeats_of(result: dict, path: Path) -> int:
    """Runs per search: the ``repeats`` that ``gain --json`` records; for files written before it did, the
    file name (``..._r30_...``)."""
    if result.get("repeats") is not None:
        return int(result["repeats"])
    found = re.search(r"_r(\d+)_", path.name)
    if not found:
        raise SystemExit(f"{path}: the file records no 'repeats' (written before gain --json did); name it with "
                         "its runs, e.g. b10_r30_nearest_svm.json")
    return int(found.group(1))


def load(paths: list[Path]) -> dict:
    """(learner, replay, budget) -> list of TaskGain, from gain --json files (the latest file wins)."""
    out = {}
    for path in paths:
        for result in json.loads(path.read_text()):
            repeats = _repeats_of(result, path)
            out[(result["learner"], result["replay"], result["budget"])] = [
                task_gain(r, repeats, result["budget"]) for r in result["tasks"]]
    return out


def figures(gains: list[TaskGain]) -> dict:
    p = pool(gains, rng=0)
    x = p.extra
    room = x["bits_best_past_task"] - p.bits_cold
    return {
        "n": p.n_tasks, "gain": p.gain, "low": p.gain_low, "high": p.gain_high, "room": room,
        # a share of the room only where there is room (at budget 20 a cold search nearly matches the
        # best single past task's top 20, and the share says nothing)
        "closed": p.gain / room if room > 0.25 else float("nan"),
        "hurt": p.share_hurt, "sig": p.significant_losses, "share_sig": p.significant_losses / p.n_tasks,
        "wtl": f"{p.wins}/{p.ties}/{p.losses}", "loss": p.share_loss, "loss_low": p.share_loss_low,
        "loss_high": p.share_loss_high, "warm": p.bits_warm, "cold": p.bits_cold,
        "vs_avg": p.bits_warm - x["bits_defaults"], "vs_near": p.bits_warm - x["bits_nearest"],
        "libdef": x.get("bits_library_default", float("nan")),
        "vs_libdef": p.bits_warm - x.get("bits_library_default", float("nan")),
        "above_libdef": x.get("share_warm_above_library_default", float("nan")),
    }


def table(runs: dict) -> dict:
    """(learner, replay, budget, half) -> figures; prints the Markdown tables."""
    out = {}
    order = sorted(runs, key=lambda k: (k[2], k[1], LEARNERS.index(k[0]) if k[0] in LEARNERS else 9, k[0]))
    for key in order:
        for half in ("all", "design", "holdout"):
            gains = [g for g in runs[key] if half == "all" or half_of(g.task) == half]
            if len(gains) >= 2:
                out[(*key, half)] = figures(gains)
    print("| learner | replay | B | half | tasks | gain (95 %) | room | closed | target (dist) | hurt | "
          "sig. losses | w/t/l | losses (Wilson 95 %) |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for (learner, replay, budget, half), f in out.items():
        target = TARGETS.get(learner) if replay == "nearest" and budget == 10 else None
        tgt = f"{target:+.2f} ({f['gain'] - target:+.2f})" if target and half == "all" else ""
        print(f"| {learner} | {replay} | {budget} | {half} | {f['n']} | {f['gain']:+.2f} ({f['low']:+.2f} to "
              f"{f['high']:+.2f}) | {f['room']:+.2f} | {'' if math.isnan(f['closed']) else format(f['closed'], '.0%')} | {tgt} | {f['hurt']:.0%} | "
              f"{f['sig']} ({f['share_sig']:.0%}) | {f['wtl']} | {f['loss']:.0%} ({f['loss_low']:.0%}-"
              f"{f['loss_high']:.0%}) |")
    print()
    print("| learner | replay | B | half | warm | cold | warm - avg-rank | warm - nearest | library default | "
          "warm - lib. default | warm above lib. default |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for (learner, replay, budget, half), f in out.items():
        print(f"| {learner} | {replay} | {budget} | {half} | {f['warm']:+.2f} | {f['cold']:+.2f} | "
              f"{f['vs_avg']:+.2f} | {f['vs_near']:+.2f} | {f['libdef']:+.2f} | {f['vs_libdef']:+.2f} | "
              f"{f['above_libdef']:.0%} |")
    return out


_CONTROL_SEARCHES = ("warm", "cold", "library_default", "defaults", "nearest", "random")


def control_figures(gains: list) -> dict:
    """Search -> (pooled bits over uniform, low, high, per-task bits) on permuted tasks (unsmoothed rates)."""
    p = np.array([g.p for g in gains])
    out = {}
    for label in _CONTROL_SEARCHES:
        if label == "warm":
            q = np.array([g.extra["raw_q_warm"] for g in gains], dtype=float)
        elif label == "cold":
            q = np.array([g.q_cold for g in gains], dtype=float)
        else:
            q = np.array([g.extra.get(f"q_{label}", float("nan")) for g in gains], dtype=float)
        if not np.isfinite(q).all():
            continue
        with np.errstate(divide="ignore"):
            per_task = np.log2(q / p)  # a task without a hit: -inf, below every b
        out[label] = (*pooled_bits_interval(q, p, rng=0), per_task)
    return out


def control(runs: dict) -> None:
    """The permuted-score control, one row per learner, replay and search."""
    print()
    print("| learner | replay | B | search | pooled bits (95 %) | <= 0 within interval | >= 1 bit (bound 50 %) | "
          ">= 2 bits (bound 25 %) |")
    print("|---|---|---|---|---|---|---|---|")
    for (learner, replay, budget), gains in sorted(runs.items()):
        pooled = pool(gains, rng=0)
        print(f"| {learner} | {replay} | {budget} | warm over cold (gain) | {pooled.gain:+.2f} ({pooled.gain_low:+.2f} "
              f"to {pooled.gain_high:+.2f}) | {'yes' if pooled.gain_low <= 0 else 'NO'} | "
              f"{np.mean([g.gain >= 1 for g in gains]):.0%} | {np.mean([g.gain >= 2 for g in gains]):.0%} |")
        for label, (bits, low, high, per_task) in control_figures(gains).items():
            print(f"| {learner} | {replay} | {budget} | {label} | {bits:+.2f} ({low:+.2f} to {high:+.2f}) | "
                  f"{'yes' if low <= 0 else 'NO'} | {_share_text(per_task, 1)} | {_share_text(per_task, 2)} |")




def plot_control(panels: list, path: Path) -> None:
    """Pooled bits over uniform of every search on permuted tasks, with 95 % intervals.

    ``panels``: a list of (title, runs) pairs, runs as :func:`load` returns them; one panel each.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(panels), figsize=(max(7.0, 5.2 * len(panels)), 4.2), sharey=True, squeeze=False)
    colors = dict(zip(_CONTROL_SEARCHES, ("#d9480f", "#1c7ed6", "#868e96", "#2b8a3e", "#94d82d", "#212529")))
    for ax, (title, runs) in zip(axes[0], panels):
        keys = sorted(runs, key=lambda k: (k[1], k[2], LEARNERS.index(k[0]) if k[0] in LEARNERS else 9))
        x = np.arange(len(keys))
        width = 0.8 / len(_CONTROL_SEARCHES)
        figures_of = [control_figures(runs[k]) for k in keys]
        for j, label in enumerate(_CONTROL_SEARCHES):
            figs = [f.get(label) for f in figures_of]
            if any(f is None for f in figs):
                continue
            vals = np.array([f[0] for f in figs])
            err = [vals - [f[1] for f in figs], np.array([f[2] for f in figs]) - vals]
            ax.bar(x + (j - (len(_CONTROL_SEARCHES) - 1) / 2) * width, vals, width, color=colors[label], label=label,
                   yerr=err, error_kw={"lw": 0.8})
        ax.axhline(0, color="black", lw=0.8)
        ax.set_xticks(x)
        ax.set_xticklabels([f"{k[0]}\n{k[1]}, B={k[2]}" for k in keys], fontsize=8)
        ax.set_title(title, fontsize=9)
    axes[0][0].set_ylabel("pooled bits over uniform on permuted tasks (95 %)")
    axes[0][-1].legend(fontsize=7, ncol=3, loc="upper left")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    print(f"\nplot written to {path}")


def _share_text(bits: np.ndarray, b: float) -> str:
    """Share of tasks with >= ``b`` bits, ``ok`` unless a one-sided binomial test over the tasks at the 1 %
    level (:func:`scipy.stats.binomtest`) puts it above ``2**-b``."""
    from scipy.stats import binomtest

    k = int(np.sum(bits >= b))
    above = binomtest(k, bits.size, markov_bound(b), alternative="greater").pvalue < 0.01
    return f"{share_at_least(bits, b):.0%} ({'ABOVE' if above else 'ok'})"


def plot(out: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    keys = [k for k in out if k[3] == "all"]
    replays = sorted({k[1] for k in keys})
    budgets = sorted({k[2] for k in keys})
    panels = [(rp, b) for b in budgets for rp in replays if any(k[1] == rp and k[2] == b for k in keys)]
    fig, axes = plt.subplots(1, len(panels), figsize=(max(7.0, 4.2 * len(panels)), 4.6), sharey=True, squeeze=False)
    bars = (("warm over cold", "gain", "#d9480f"), ("hindsight room", "room", "#1c7ed6"),
            ("warm - avg-rank list", "vs_avg", "#2b8a3e"), ("warm - nearest list", "vs_near", "#94d82d"),
            ("warm - library default", "vs_libdef", "#868e96"))
    for ax, (replay, budget) in zip(axes[0], panels):
        learners = [lr for lr in LEARNERS if (lr, replay, budget, "all") in out]
        x = np.arange(len(learners))
        width = 0.8 / len(bars)
        for j, (label, field, color) in enumerate(bars):
            vals = [out[(lr, replay, budget, "all")][field] for lr in learners]
            ax.bar(x + (j - (len(bars) - 1) / 2) * width, vals, width, label=label, color=color)
            if field == "gain":
                lo = [out[(lr, replay, budget, "all")]["low"] for lr in learners]
                hi = [out[(lr, replay, budget, "all")]["high"] for lr in learners]
                ax.errorbar(x + (j - (len(bars) - 1) / 2) * width, vals,
                            yerr=[np.subtract(vals, lo), np.subtract(hi, vals)], fmt="none", color="black", lw=1)
        if replay == "nearest" and budget == 10:
            for i, lr in enumerate(learners):
                ax.plot([i - 0.45, i + 0.45], [TARGETS[lr]] * 2, color="black", lw=1.5, ls="--",
                        label="target (75 % of room)" if i == 0 else None)
        ax.axhline(0, color="black", lw=0.6)
        ax.set_xticks(x)
        ax.set_xticklabels(learners)
        ax.set_title(f"{replay} replay, budget {budget}")
    axes[0][0].set_ylabel("bits (pooled over the starter tasks)")
    axes[0][0].legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.08), ncol=3)
    fig.suptitle("Issue 18: warm search against cold, static lists, library default", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    print(f"\nplot written to {path}")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("files", type=Path, nargs="*", help="outputs of `warmstart gain --json`")
    ap.add_argument("--control", type=Path, nargs="*", default=[], help="outputs of `gain --permuted --json`")
    ap.add_argument("--plot", type=Path)
    ap.add_argument("--control-plot", type=Path, help="draw the control's pooled bits of every search here")
    ap.add_argument("--control-before", type=Path, nargs="*", default=[],
                    help="control outputs of an earlier protocol, drawn in a panel of their own beside --control")
    args = ap.parse_args(argv)
    out = table(load(args.files)) if args.files else {}
    if args.control:
        runs = load(args.control)
        control(runs)
        if args.control_plot:
            before = [("before", load(args.control_before))] if args.control_before else []
            plot_control(before + [("after" if before else "permuted scores", runs)], args.control_plot)
    if args.plot and out:
        plot(out, args.plot)


if __name__ == "__main__":
    main()
