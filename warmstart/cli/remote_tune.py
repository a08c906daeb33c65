"""``tune --server``: the trials run on this machine, the study lives on the
team service. Each config is a lease (so other jobs tuning the same study get
other configs) and each result is recorded by its trial id as it finishes,
through the one search loop (:func:`~warmstart.search.strategy.run_search`)."""

from __future__ import annotations

import sys
from collections import deque
from pathlib import Path

import click

from warmstart.cli.common import print_json
from warmstart.search.strategy import SearchStrategy, run_search

__all__ = ["LeaseStrategy", "tune_through_service"]


class LeaseStrategy(SearchStrategy):
    """A strategy whose proposals are leases of a study on a service.

    Parameters
    ----------
    client : warmstart.client.Client
    study : int
    space : Space
    maximize : bool
    """

    def __init__(self, client, study: int, space, maximize: bool):
        super().__init__(space, seed=0, maximize=maximize)
        self.client, self.study = client, int(study)
        self._ids: dict[str, deque] = {}

    def _propose_one(self):
        lease = self.client.propose(self.study, k=1)[0]
        config = self.space.normalize(lease["config"])
        self._ids.setdefault(self.space.canonical_json(config), deque()).append(int(lease["trial"]))
        return config, "lease"

    def trial_id(self, config) -> int:
        """The lease id of a proposed config (first proposed, first out)."""
        return self._ids[self.space.canonical_json(config)].popleft()


def tune_through_service(ctx, client, frame, data, target, kind, keep_columns, task_name, learner, space, metric,
                         maximize, cold, n_seeds, budget, objective, n_workers, as_json) -> None:
    from warmstart.client import task_description
    from warmstart.evaluate.objective import local_pool, stop_pool

    task = task_description(frame, target, task_name or Path(data).stem, kind=kind, keep_columns=keep_columns,
                            source=str(data))
    made = client.new_study(task, learner, space=space.to_dict(), metric=metric, maximize=maximize, cold=cold,
                               n_seeds=n_seeds)
    study = made["study_id"]
    click.echo(f"study {study} on {client.url}: {learner} on {Path(data).name} ({kind}), {metric} "
               f"({made['direction']}), budget {budget}; {made['note']}", err=True)
    strategy = LeaseStrategy(client, study, space, maximize)
    pool = None
    executor = None
    if budget and n_workers > 1:
        pool, proxy = local_pool(n_workers, objective)
        executor, evaluate = pool, proxy
    else:
        evaluate = objective
    counts = {"ok": 0, "failed": 0}
    last = {}
    interrupted = False
    with click.progressbar(length=budget, label="tuning", file=sys.stderr, show_pos=True, show_eta=True,
                           item_show_func=lambda s: s) as bar:
        def keep(trial) -> None:
            error = trial.error
            answer = client.record(study, trial=strategy.trial_id(trial.config), score=trial.score,
                                   failed=trial.status == "failed", error=error if trial.status == "failed" else None,
                                   cost_s=trial.cost_s)
            last.update(answer)
            counts[trial.status] += 1
            best = answer["best_score"]
            bar.update(1, f"best {'-' if best is None else f'{best:.4g}'}, {counts['failed']} failed")

        try:
            if budget:
                run_search(strategy, evaluate, budget, callback=keep, n_workers=n_workers, executor=executor)
        except KeyboardInterrupt:
            interrupted = True
            if pool is not None:
                stop_pool(pool)
                pool = None
        finally:
            if pool is not None:
                pool.shutdown(wait=True)
            if hasattr(objective, "close"):
                objective.close()
    if not interrupted:
        client.finish(study)
    row = client.study(study, top=1)
    best = row["best_trials"][0] if row["best_trials"] else None
    summary = {"study_id": study, "task": row["task"], "learner": learner, "metric": metric,
               "direction": row["direction"], "origin": row["origin"], "trial_count": counts["ok"] + counts["failed"],
               "n_failed": counts["failed"], "best_score": row["best_score"], "server": client.url,
               "best_config": None if best is None else {k: best[k] for k in space.names if best.get(k) is not None},
               "interrupted": interrupted}
    if as_json:
        print_json(summary)
    else:
        state = "interrupted: " if interrupted else ""
        click.echo(f"{state}study {study} ({learner} on task {row['task']!r}, on {client.url}): "
                   f"{summary['trial_count']} trials, {counts['failed']} failed")
        if summary["best_config"]:
            click.echo(f"best {metric} {row['best_score']:.6g}")
            width = max(len(name) for name in summary["best_config"])
            for name, value in summary["best_config"].items():
                click.echo(f"  {name.ljust(width)}  {value}")
    if interrupted:
        ctx.exit(130)
