"""Commands that run searches: ``tune`` (evaluate here), ``propose`` and
``record`` (evaluate elsewhere). Starting, resuming and running a study is
:mod:`warmstart.study`; these commands parse, call and print."""

from __future__ import annotations

import json
import math
import signal
import sys
from pathlib import Path

import click

from warmstart.cli.common import (
    fail,
    get_archive,
    json_option,
    keep_column_option,
    print_json,
    PROGRESS_CELLS,
    profile_table,
    read_data,
    release_archive,
    strict_option,
    terminate_as_interrupt,
    wait_seconds,
)
from warmstart.archive.turns import ArchiveTurns
from warmstart.cli.limits import MAX_PROPOSALS, MAX_TRIALS, MAX_WORKERS
from warmstart.cli.main import main
from warmstart.cli.progress import Progress
from warmstart.evaluate.learners import (
    LEARNERS,
    METRICS,
    TASK_KINDS,
    cv_objective,
    default_space,
    metric_direction,
)
from warmstart.evaluate.objective import CommandObjective
from warmstart.profile import detect_kind
from warmstart.search.density import DEFAULT_N_SEEDS as DEFAULT_SEEDS
from warmstart.space import Space
from warmstart.study import resume_study, run_study, start_study, summary


#: ``propose -k`` draws a progress bar from this many configs on (a few seconds of work)
PROGRESS_PROPOSALS = 100


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
@click.option("--budget", default=40, show_default=True, type=click.IntRange(0, MAX_TRIALS),
              help=f"Trials to evaluate (0: only create the study, for propose/record); at most {MAX_TRIALS:,}: "
                   "each proposal looks at every earlier trial, so split longer work into several studies.")
@click.option("--metric", help=f"Built-in metric ({', '.join(METRICS)}); default accuracy or r2.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the search and the CV folds.")
@click.option("--workers", type=click.IntRange(1, MAX_WORKERS),
              help=f"Trials evaluated at once (local processes, at most {MAX_WORKERS}; more with --cluster).")
@click.option("--cluster", metavar="ADDRESS",
              help="Evaluate on the workers of the Dask scheduler at ADDRESS (needs warmstart[cluster]); "
                   "--workers defaults to the cluster's threads.")
@click.option("--cold", is_flag=True, help="Force a cold start (no prior).")
@click.option("--ranked-first", "n_seeds", default=None, type=click.IntRange(0, DEFAULT_SEEDS), metavar="N",
              help="Warm start by trying N of the prior's ranked past configs first, then the search's own model "
                   "(the warm start before the mixture). Default: the mixture of past tasks, re-weighted at every "
                   "result. (Not a random seed: that is --seed.)")
@click.option("--seeds", "old_seeds", default=None, type=click.IntRange(0, DEFAULT_SEEDS), hidden=True,
              help="Deprecated name of --ranked-first.")
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
def tune(ctx, data, target, learner, space_path, budget, metric, seed, workers, cluster, cold, n_seeds, old_seeds,
         command, minimize, cv, time_limit, task_name, kind, keep_columns, as_json):
    """Tune LEARNER on DATA and record every trial in the archive as it finishes.

    The study keeps what it finished if the search is interrupted (Ctrl-C).
    Columns that look like row identifiers are left out of the features and
    dates written as text count as days (a note names each); --keep-column
    keeps one as it is.

    \b
    Exit status:
      0    at least one trial succeeded (or --budget 0)
      1    an error, or every trial failed
      130  stopped by Ctrl-C (SIGINT); 143 stopped by SIGTERM
    A stopped run prints the same summary either way, and keeps what it finished.
    """
    n_seeds = _ranked_first(n_seeds, old_seeds)
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
    big = frame.shape[0] * frame.shape[1] >= PROGRESS_CELLS  # profiled here, with a progress bar
    prof = profile_table(frame, target, data, kind, keep_columns) if keep_columns or big else None
    task_id = archive.add_task(task_name or Path(data).stem, frame, target, kind=kind, source=str(data), profile=prof)
    study = start_study(archive, task_id, learner, space, metric=metric, maximize=maximize, seed=seed, cold=cold,
                        n_seeds=n_seeds)
    # from here on the file is held only while a result is written: other commands (and other tunes)
    # use the archive while this one trains
    if archive.path != ":memory:":  # a throw-away archive lives only in this connection: kept open
        study.archive = ArchiveTurns(release_archive(ctx), notice=wait_seconds(ctx), on_busy=_busy_note)
    click.echo(f"study {study.study_id}: {learner} on {Path(data).name} ({kind}), {metric} "
               f"({'maximize' if maximize else 'minimize'}), budget {budget}; {study.note}", err=True)
    failed = 0
    with click.progressbar(length=budget, label="tuning", file=sys.stderr,
                           show_pos=True, show_eta=True, item_show_func=lambda s: s) as bar:
        def show(trial) -> None:
            nonlocal failed
            failed += trial.status == "failed"
            best = study.search.best
            bar.update(1, f"best {_fmt(best.score if best else None)}, {failed} failed")

        # a cluster pool, if any, is shut down when the command closes (ctx.call_on_close above)
        with terminate_as_interrupt() as stop:
            run = run_study(study, objective, budget, n_workers=n_workers, executor=executor, callback=show)
    _report(study, run, as_json, budget)
    if run.interrupted:
        ctx.exit(143 if stop.signal == signal.SIGTERM else 130)
    if budget and len(run.trials) == run.n_failed:
        click.echo(f"error: every trial failed ({run.n_failed} of {run.n_failed}); exit status 1", err=True)
        ctx.exit(1)


def _ranked_first(n_ranked: int | None, old_seeds: int | None) -> int | None:
    """``--ranked-first N``, or its deprecated name ``--seeds N`` with a note on stderr."""
    if old_seeds is None:
        return n_ranked
    if n_ranked is not None:
        raise click.UsageError("--seeds is the old name of --ranked-first; give only --ranked-first")
    click.echo(f"note: --seeds is deprecated and will go; it is now --ranked-first {old_seeds} (try {old_seeds} of "
               "the prior's ranked past configs first; the random seed is --seed)", err=True)
    return old_seeds


def _busy_note(path: str) -> None:
    click.echo(f"note: {path}: another process holds the archive; this result waits for it (Ctrl-C stops; "
               "`warmstart serve` shares one archive among many processes)", err=True)


def _report(study, run, as_json, budget) -> None:
    out = summary(study, run)
    if as_json:
        print_json(out)
        return
    state = "interrupted: " if run.interrupted else ""
    click.echo(f"{state}study {study.study_id} ({out['learner']} on task {out['task']!r}): "
               f"{out['trial_count']} trials, {out['n_failed']} failed")
    for text, n in list(out["failures"].items())[:2]:
        click.echo(f"  {n} failed with: {text}")
    best = study.search.best
    if best is None:
        hint = ("evaluate configs with `warmstart propose --study "
                f"{study.study_id}` and `warmstart record`") if budget == 0 else "no trial succeeded"
        click.echo(hint)
        return
    click.echo(f"best {out['metric']} {best.score:.6g}")
    width = max(len(name) for name in best.config)
    for name, value in best.config.items():
        click.echo(f"  {name.ljust(width)}  {value}")


# -- propose / record -----------------------------------------------------------
@main.command()
@click.option("--study", "study", required=True, type=int, help="Study id (see `warmstart studies`).")
@click.option("-k", "k", default=1, show_default=True, type=click.IntRange(1, MAX_PROPOSALS),
              help=f"Configs to propose, one per parallel job; at most {MAX_PROPOSALS:,} (each waits as a pending "
                   "config while the next is chosen, so a bigger batch takes minutes).")
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
    resumed = resume_study(archive, study, seed)
    # one at a time, each held as pending: the same configs as search.propose(k), with progress
    bar = Progress(f"proposing {k} configs", enabled=k >= PROGRESS_PROPOSALS and not as_json)
    configs = []
    for i in range(k):
        configs.append(resumed.search.propose())
        bar(i + 1, k)
    best = resumed.search.best
    click.echo(f"study {study}: {resumed.search.trial_count} trials recorded, "
               f"best {_fmt(None if best is None else best.score)}; {resumed.note}", err=True)
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
