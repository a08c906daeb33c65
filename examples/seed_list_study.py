"""How many target hits can a list of past configs reach on the starter history?

An offline study of seed-list policies at a fixed budget, on the score
matrices of the shipped starter history (``archive/starter/``: every study of a
learner uses one shared design, so tasks x configs is a full matrix). Each task
is held out in turn; a policy picks ``budget`` distinct configs one at a time,
seeing the held-out scores of what it already picked; a pick is a hit when its
score is in the task's top 5 % (the same target as ``warmstart gain``).

Policies:

``average rank``
    the static order of mean within-study quantile over the other tasks
    ("learned defaults").
``re-weighted``
    the rule ``Prior.reweight`` uses: source weights multiplied by
    ``((1 - e) / e) ** ((concordant - discordant) / (n - 1))``, ``e = 0.25``,
    then the best weighted mean quantile not yet tried.
``re-weighted, oracle start``
    the same, starting from weights that know each past task's true rank
    correlation with the held-out one (a bound on what better meta-features
    could give).
``best past task (hindsight)``
    the top list of the single past task that hits most, chosen after seeing
    the held-out scores.
``ideal list``
    every target config first: ``min(|T|, B) / B``.
``re-weighted, then incumbent``
    ``k`` re-weighted picks, then the best config so far again and again (what
    a search earns under replay by returning next to a hit).

Run::

    python examples/seed_list_study.py --budget 10

It prints the per-query hit rate q of each policy and the share of tasks on
which it never hit. Pure numpy/pandas; a few seconds.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import rankdata

STARTER = Path(__file__).resolve().parents[1] / "archive" / "starter"
PAIR_ERROR = 0.25  # as in warmstart.prior


def matrices(learner: str, gamma: float):
    """(quantiles, targets, scores) per task kind for one learner."""
    trials = pd.read_parquet(STARTER / "trials.parquet")
    tasks = pd.read_parquet(STARTER / "tasks.parquet")
    kind = dict(zip(tasks["name"], tasks["kind"]))
    ok = trials[(trials["learner"] == learner) & (trials["status"] == "ok")]
    for k in sorted(set(kind.values())):
        part = ok[ok["task"].map(kind) == k]
        S = part.pivot_table(index="task", columns="config", values="score", aggfunc="first").dropna(axis=1)
        A = S.to_numpy(dtype=float)
        n_top = max(1, math.ceil(gamma * A.shape[1]))
        thr = -np.sort(-A, axis=1)[:, n_top - 1]
        T = A >= thr[:, None]
        Q = (np.apply_along_axis(rankdata, 1, A) - 0.5) / A.shape[1]
        yield Q, T, A


def concordance(pred: np.ndarray, y: np.ndarray) -> np.ndarray:
    """(concordant - discordant) pairs of each row of ``pred`` with ``y``."""
    dp = np.sign(pred[:, :, None] - pred[:, None, :])
    dy = np.sign(y[:, None] - y[None, :])
    iu = np.triu_indices(len(y), k=1)
    return (dp * dy)[:, iu[0], iu[1]].sum(axis=1)


def reweighted(Q, A, i, budget, start=None, then_incumbent=None):
    others = np.delete(np.arange(len(Q)), i)
    Qo = Q[others]
    base = np.zeros(len(others)) if start is None else np.log(np.maximum(start, 1e-300))
    lam = math.log((1 - PAIR_ERROR) / PAIR_ERROR)
    tried = []
    for b in range(budget):
        if then_incumbent is not None and b >= then_incumbent:
            tried.append(tried[int(np.argmax(A[i, tried]))])
            continue
        logw = base.copy()
        if len(tried) >= 2:
            logw += lam * concordance(Qo[:, tried], A[i, tried]) / (len(tried) - 1)
        w = np.exp(logw - logw.max())
        score = (w / w.sum()) @ Qo
        score[tried] = -np.inf
        tried.append(int(np.argmax(score)))
    return tried


def study(learner: str, budget: int, gamma: float) -> pd.DataFrame:
    rows: dict[str, list[np.ndarray]] = {}
    for Q, T, A in matrices(learner, gamma):
        R = np.corrcoef(np.apply_along_axis(rankdata, 1, Q))
        for i in range(len(Q)):
            others = np.delete(np.arange(len(Q)), i)
            picks = {
                "average rank": list(np.argsort(-Q[others].mean(axis=0), kind="stable")[:budget]),
                "re-weighted": reweighted(Q, A, i, budget),
                "re-weighted, oracle start": reweighted(
                    Q, A, i, budget, start=np.exp((R[i, others] - R[i, others].max()) / 0.1)),
                "re-weighted, then incumbent (k=5)": reweighted(Q, A, i, budget, then_incumbent=5),
            }
            for name, chosen in picks.items():
                rows.setdefault(name, []).append(T[i, chosen])
            best = max((T[i, np.argsort(-Q[j], kind="stable")[:budget]] for j in others), key=np.sum)
            rows.setdefault("best past task (hindsight)", []).append(best)
            n_target = int(T[i].sum())
            rows.setdefault("ideal list", []).append(np.arange(budget) < n_target)
    out = []
    for name, hits in rows.items():
        H = np.vstack(hits)
        out.append({"learner": learner, "policy": name, "q": H.mean(), "tasks_never_hit": np.mean(H.sum(axis=1) == 0)})
    return pd.DataFrame(out)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--budget", type=int, default=10)
    parser.add_argument("--gamma", type=float, default=0.05)
    args = parser.parse_args()
    frame = pd.concat([study(learner, args.budget, args.gamma) for learner in ("svm", "knn")])
    print(f"budget {args.budget}, target top {args.gamma:.0%}; q = per-query hit rate over held-out tasks")
    print(frame.to_string(index=False, float_format=lambda v: f"{v:.3f}"))


if __name__ == "__main__":
    main()
