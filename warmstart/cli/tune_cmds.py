"""Commands that run searches: ``tune`` (evaluate here), ``propose`` and
``record`` (evaluate elsewhere)."""

from __future__ import annotations

import json
import math
import sys
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path

import click
import duckdb
import numpy as np

from warmstart.cli.common import fail, get_archive, json_option, keep_column_option, print_json, read_data, strict_option
from warmstart.cli.main import main
from warmstart.evaluate.learners import LEARNERS, TASK_KINDS, cv_objective, default_space, metric_direction, METRICS
from warmstart.evaluate.objective import CommandObjective, local_pool, score_function, stop_pool
from warmstart.profile import detect_kind, profile
from warmstart.search.density import DEFAULT_N_SEEDS as DEFAULT_SEEDS, DensitySearch, run_search
from warmstart.space import Space



def _start_search(archive, task_id: int, learner: str, space: Space, maximize: bool, seed: int, cold: bool,
                  n_seeds: int = DEFAULT_SEEDS):
    """The search a study starts with, its origin, the prior's provenance and a
    note for the user.

    Warm by default: a prior from the archive's studies of the same learner on
    other tasks. Cold when ``cold`` is set or when there is nothing to learn from.
    ``n_seeds`` past configs are tried first; the provenance records it, so
    ``propose`` rebuilds the same search.
    """
    from warmstart.prior import PriorError

    if cold:
        return DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None, "cold start (--cold)"
    profiles = archive.profiles()
    if task_id not in profiles.index:
        return DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None, \
            "cold start: this task has no profile to compare"
    prof = archive.profile_of(task_id)
    try:
        # the prior lists exactly n_seeds configs: a search rebuilt by `propose` from recorded trials
        # skips the listed configs already tried, so the list's length is what bounds the seed phase
        prior = archive.build_prior(prof, learner=learner, space=space, exclude_tasks=[task_id],
                                    n_seeds=max(n_seeds, 1))
    except PriorError as exc:
        return DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None, \
            f"cold start: {exc}"
    heaviest = prior.provenance["neighbors"][:3]
    used = ", ".join(f"{n['task']!r} (study {n['study_id']}, weight {n['weight']:.2f})" for n in heaviest)
    note = (f"warm start from {len(prior.sources)} past studies of {learner!r}; heaviest: {used}; "
            f"prior strength n0 = {prior.strength:.1f}")
    if n_seeds != DEFAULT_SEEDS:
        note += f"; {n_seeds} past config(s) first"
    search = DensitySearch(space, prior=prior, seed=seed, maximize=maximize, n_seeds=n_seeds)
    return search, "warm", {**prior.provenance, "n_seeds": n_seeds}, note


def _stamp(unix: float | None) -> datetime | None:
    return None if unix is None else datetime.fromtimestamp(unix, timezone.utc)


def _fmt(score) -> str:
    return "-" if score is None or (isinstance(score, float) and math.isnan(score)) else f"{score:.4g}"


# -- tune -----------------------------------------------------------------------
def _objective_and_space(data, target, learner, kind, space_path, metric, minimize, command,
                         cv, seed, time_limit, threads, keep_columns=()):
    """Check every input and build (objective, space, metric, maximize) before
    anything is written to the archive."""
    builtin = learner in LEARNERS
    space = Space.load(space_path) if space_path else None
    if command:
        if space is None:
            if not builtin:
                fail(f"learner {learner!r} is not built-in; give its space with --space FILE "
                     f"(built-in learners: {', '.join(sorted(LEARNERS))})")
            space = default_space(learner, kind)
        if metric in METRICS:
            maximize = metric_direction(metric)
            if minimize and maximize:
                fail(f"--minimize contradicts metric {metric!r}, which is maximised")
        else:
            maximize = not minimize
        return CommandObjective(command, timeout=time_limit), space, metric or "score", maximize
    if not builtin:
        fail(f"learner {learner!r} is not built-in (built-in: {', '.join(sorted(LEARNERS))}); "
             "to tune your own model give --command and --space")
    if minimize:
        fail("--minimize is for --command objectives; a built-in metric knows its direction")
    objective = cv_objective(data, target, learner, metric=metric, kind=kind, cv=cv, seed=seed,
                             time_limit=time_limit, space=space, threads=threads, keep_columns=keep_columns)
    return objective, objective.space, objective.metric, objective.maximize


@main.command()
@click.argument("data", type=click.Path(dir_okay=False))
@click.option("--target", required=True, help="Target column of DATA.")
@click.option("--learner", required=True,
              help=f"Built-in learner ({', '.join(sorted(LEARNERS))}) or your own label with --command.")
@click.option("--space", "space_path", type=click.Path(dir_okay=False),
              help="Space file (.toml/.json); built-in learners have a default.")
@click.option("--budget", default=40, show_default=True, type=click.IntRange(min=0),
              help="Trials to evaluate (0: only create the study, for propose/record).")
@click.option("--metric", help=f"Built-in metric ({', '.join(METRICS)}); default accuracy or r2.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the search and the CV folds.")
@click.option("--workers", type=click.IntRange(min=1), help="Trials evaluated at once (local processes).")
@click.option("--cluster", metavar="ADDRESS",
              help="Evaluate on the workers of the Dask scheduler at ADDRESS (needs warmstart[cluster]); "
                   "--workers defaults to the cluster's threads.")
@click.option("--cold", is_flag=True, help="Force a cold start (no prior).")
@click.option("--seeds", "n_seeds", default=DEFAULT_SEEDS, show_default=True, type=click.IntRange(0, DEFAULT_SEEDS),
              help="Warm start: past configs tried before the search's own model takes over (fewer is bolder: "
                   "more gain on average, more tasks where it loses to a cold start).")
@click.option("--command", help="Evaluate each config by running this command (no shell); see DEVELOPERS.md.")
@click.option("--minimize", is_flag=True, help="With --command: lower scores are better.")
@click.option("--cv", default=5, show_default=True, type=click.IntRange(min=2), help="Cross-validation folds.")
@click.option("--time-limit", type=click.FloatRange(min=0, min_open=True), metavar="SECONDS",
              help="Per-trial limit; a trial over it is recorded as failed.")
@click.option("--task", "task_name", help="Task name in the archive (default: DATA's file name).")
@click.option("--kind", type=click.Choice(TASK_KINDS), help="Kind of task (default: from the target).")
@keep_column_option
@strict_option
@json_option
@click.pass_context
def tune(ctx, data, target, learner, space_path, budget, metric, seed, workers, cluster, cold, n_seeds, command,
         minimize, cv, time_limit, task_name, kind, keep_columns, as_json):
    """Tune LEARNER on DATA and record every trial in the archive as it finishes.

    The study keeps what it finished if the search is interrupted (Ctrl-C).
    Columns that look like row identifiers are left out of the features and
    dates written as text count as days (a note names each); --keep-column
    keeps one as it is.
    """
    frame = read_data(data, target, keep_columns=keep_columns)
    kind = kind or detect_kind(frame[target])
    n_workers = workers or 1
    objective, space, metric, maximize = _objective_and_space(
        frame, target, learner, kind, space_path, metric, minimize, command, cv, seed, time_limit,
        threads=1, keep_columns=keep_columns,
    )
    from warmstart.cli.remote import server_client

    service = server_client(ctx)
    if service is not None:  # trials run here, results recorded through the service
        if cluster:
            fail("--cluster with --server is not supported yet; evaluate with --workers N here")
        from warmstart.cli.remote_tune import tune_through_service

        return tune_through_service(ctx, service, frame, data, target, kind, keep_columns, task_name, learner,
                                    space, metric, maximize, cold, n_seeds, budget, objective, n_workers, as_json)
    executor = None
    if cluster and budget:  # trials run on the cluster's workers (evaluate/cluster.py)
        from warmstart.evaluate.cluster import ClusterPool

        executor = ClusterPool(cluster)
        # at the end, or on any error: a trial already running on a worker is not stopped
        ctx.call_on_close(lambda: executor.shutdown(wait=False, cancel_futures=True))
        n_workers = workers or executor.cores
    archive = get_archive(ctx, write=True)
    # the task (its fingerprint) is the table as read; its profile sees the features the learner sees
    prof = profile(frame, target=target, kind=kind, keep_columns=keep_columns) if keep_columns else None
    task_id = archive.add_task(task_name or Path(data).stem, frame, target, kind=kind, source=str(data), profile=prof)
    search, origin, provenance, note = _start_search(archive, task_id, learner, space, maximize, seed, cold, n_seeds)
    study = archive.add_study(task_id, learner, space, metric=metric, maximize=maximize, origin=origin,
                              prior=provenance)
    click.echo(f"study {study}: {learner} on {Path(data).name} ({kind}), {metric} "
               f"({'maximize' if maximize else 'minimize'}), budget {budget}; {note}", err=True)
    pool = None
    if budget and n_workers > 1 and executor is None:
        pool, proxy = local_pool(n_workers, objective)
        executor, evaluate = pool, score_function(proxy)
    else:
        evaluate = score_function(objective)
        if executor is not None:  # sent to each worker once, which keeps it (and a trial process) between trials
            executor.share(evaluate)
    counts = {"ok": 0, "failed": 0}
    errors: Counter = Counter()
    interrupted = False
    with click.progressbar(length=budget, label="tuning", file=sys.stderr,
                           show_pos=True, show_eta=True, item_show_func=lambda s: s) as bar:
        def keep(trial) -> None:
            error = trial.error
            if error and error.startswith("TrialFailed: "):
                error = error[len("TrialFailed: "):]
            archive.record_trial(study, trial.config, trial.score, status=trial.status, cost_s=trial.cost_s,
                                 started_at=_stamp(trial.started_at), finished_at=_stamp(trial.finished_at),
                                 error=error)
            counts[trial.status] += 1
            if trial.status == "failed":
                errors[error or "no error text"] += 1
            best = search.best
            bar.update(1, f"best {_fmt(best.score if best else None)}, {counts['failed']} failed")

        try:
            if budget:
                run_search(search, evaluate, budget, callback=keep, n_workers=n_workers, executor=executor)
        except (KeyboardInterrupt, RuntimeError, duckdb.Error) as exc:
            # Ctrl-C may land inside a DuckDB query, which then raises its own
            # "interrupted" error instead of KeyboardInterrupt
            if not isinstance(exc, KeyboardInterrupt) and "interrupt" not in str(exc).lower():
                raise
            interrupted = True
            if pool is not None:
                stop_pool(pool)
                pool = None
        finally:
            if pool is not None:
                pool.shutdown(wait=True)
            if hasattr(objective, "close"):  # the trial process of a time limit (learners.CVObjective)
                objective.close()
    if not interrupted:
        archive.finish_study(study)
    _report(archive, study, search, counts, interrupted, as_json, budget, errors)
    if interrupted:
        ctx.exit(130)


def _report(archive, study, search, counts, interrupted, as_json, budget, errors=None) -> None:
    row = archive.study(study)
    best = search.best
    summary = {
        "study_id": study, "task_id": int(row["task_id"]), "task": row["task"], "learner": row["learner"],
        "metric": row["metric"], "direction": row["direction"], "origin": row["origin"],
        "trial_count": counts["ok"] + counts["failed"], "n_failed": counts["failed"],
        "best_score": None if best is None else best.score,
        "best_config": None if best is None else best.config, "interrupted": interrupted,
        "failures": dict((errors or Counter()).most_common()),
    }
    if as_json:
        print_json(summary)
        return
    state = "interrupted: " if interrupted else ""
    click.echo(f"{state}study {study} ({row['learner']} on task {row['task']!r}): "
               f"{summary['trial_count']} trials, {summary['n_failed']} failed")
    for text, n in (errors or Counter()).most_common(2):
        click.echo(f"  {n} failed with: {text}")
    if best is None:
        hint = ("evaluate configs with `warmstart propose --study "
                f"{study}` and `warmstart record`") if budget == 0 else "no trial succeeded"
        click.echo(hint)
        return
    click.echo(f"best {row['metric']} {best.score:.6g}")
    width = max(len(name) for name in best.config)
    for name, value in best.config.items():
        click.echo(f"  {name.ljust(width)}  {value}")


# -- propose / record -----------------------------------------------------------
def _rebuilt_search(archive, study: int, seed: int):
    """A fresh search fed with the study's recorded trials.

    The generator is seeded with (seed, study, number of trials), so the same
    history gives the same proposals and every new result moves on.
    """
    info = archive.study(study)
    trials = archive.trials(study)
    rng = np.random.default_rng([seed, study, len(trials)])
    prior, note, n_seeds = None, "cold start", DEFAULT_SEEDS
    if info["origin"] == "warm":
        n_seeds = int((info["prior"] or {}).get("n_seeds", DEFAULT_SEEDS))
        fresh, _, _, note = _start_search(archive, int(info["task_id"]), info["learner"], info["space"],
                                          info["maximize"], 0, cold=False, n_seeds=n_seeds)
        prior = fresh.prior
    info["note"] = note
    search = DensitySearch(info["space"], prior=prior, seed=rng, maximize=info["maximize"], n_seeds=n_seeds)
    for config, score, status in zip(trials["config"], trials["score"], trials["status"]):
        search.record(config, None if status == "failed" else float(score), status)
    return info, search


@main.command()
@click.option("--study", "study", required=True, type=int, help="Study id (see `warmstart studies`).")
@click.option("-k", "k", default=1, show_default=True, type=click.IntRange(min=1), help="Configs to propose.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the search.")
@json_option
@click.pass_context
def propose(ctx, study, k, seed, as_json):
    """Propose the next config(s) of a STUDY whose trials run elsewhere.

    Prints one JSON config per line. Proposals are not stored: the same
    history gives the same proposals, so ask for -k N at once for N
    parallel jobs, then `warmstart record` each result.
    """
    from warmstart.cli.remote import propose_leases, server_client

    if (client := server_client(ctx)) is not None:  # leases: parallel jobs get distinct configs
        return propose_leases(client, study, k, None, as_json)
    archive = get_archive(ctx, write=False)
    info, search = _rebuilt_search(archive, study, seed)
    configs = search.propose(k)
    click.echo(f"study {study}: {search.trial_count} trials recorded, best {_fmt(info['best_score'])}; "
               f"{info['note']}", err=True)
    if as_json:
        print_json({"study_id": study, "configs": configs})
        return
    for config in configs:
        click.echo(json.dumps(config, sort_keys=True))


@main.command()
@click.option("--study", "study", required=True, type=int, help="Study id.")
@click.option("--config", "config_text", metavar="JSON", help='The config, e.g. \'{"C": 1.5}\'.')
@click.option("--trial", "trial", type=click.IntRange(min=1), metavar="ID",
              help="With --server: the id of a leased trial (from propose) instead of --config.")
@click.option("--score", type=float, help="The score in the study's metric.")
@click.option("--failed", is_flag=True, help="The config failed (no score).")
@click.option("--error", help="What went wrong (with --failed).")
@click.option("--cost", type=click.FloatRange(min=0), metavar="SECONDS", help="Wall time of the evaluation.")
@json_option
@click.pass_context
def record(ctx, study, config_text, trial, score, failed, error, cost, as_json):
    """Record the result of one config of a STUDY (committed at once).

    With --server, --trial ID records a leased trial; --config records a
    config that was never proposed.
    """
    from warmstart.cli.remote import server_client

    client = server_client(ctx)
    if (trial is None) == (config_text is None):
        raise click.UsageError("give --config JSON" + (" or --trial ID (a lease from propose)" if client else "")
                               + ("" if trial is None else "; not both"))
    if trial is not None and client is None:
        raise click.UsageError("--trial names a lease of a team service: give --server URL (or WARMSTART_SERVER), "
                               "or record by --config")
    config = None if config_text is None else _config_argument(config_text)
    if failed == (score is not None):
        raise click.UsageError("give either --score X or --failed (with --error TEXT)")
    if score is not None and not math.isfinite(score):
        raise click.BadParameter(f"must be a finite number, got {score}; use --failed for a failed trial",
                                 param_hint="--score")
    if error and not failed:
        raise click.UsageError("--error goes with --failed")
    if client is not None:
        done = client.record(study, trial=trial, config=config, score=score, failed=failed,
                             error=(error or "failed (recorded by hand)") if failed else None, cost_s=cost)
        if as_json:
            print_json(done)
            return
        what = "failed" if failed else f"score {score:.6g}"
        again = " (recorded before with the same result: nothing changed)" if done["repeat"] else ""
        click.echo(f"recorded trial {done['trial']} as number {done['number']} of study {study} ({what}){again}; "
                   f"best {_fmt(done['best_score'])} over {done['trial_count']} trials")
        return
    _record_here(ctx, study, config, score, failed, error, cost, as_json)


def _config_argument(config_text: str) -> dict:
    try:
        config = json.loads(config_text)
    except json.JSONDecodeError as exc:
        raise click.BadParameter(f"not valid JSON ({exc.msg} at character {exc.pos}): {config_text!r}",
                                 param_hint="--config") from None
    if not isinstance(config, dict):
        raise click.BadParameter(f"must be a JSON object of parameter values, got {config_text!r}",
                                 param_hint="--config")
    return config


def _record_here(ctx, study, config, score, failed, error, cost, as_json) -> None:
    archive = get_archive(ctx, write=True)
    info = archive.study(study)
    number = archive.record_trial(study, config, None if failed else score,
                                  status="failed" if failed else "ok", cost_s=cost,
                                  error=(error or "failed (recorded by hand)") if failed else None)
    row = archive.study(study)
    if as_json:
        print_json({"study_id": study, "number": number, "status": "failed" if failed else "ok",
                    "score": score, "best_score": row["best_score"], "trial_count": int(row["trial_count"])})
        return
    what = "failed" if failed else f"{info['metric']} {score:.6g}"
    click.echo(f"recorded trial {number} of study {study} ({what}); "
               f"best {_fmt(row['best_score'])} over {row['trial_count']} trials")
