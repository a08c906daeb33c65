"""Commands that create the archive and move trials in and out of it:
``init``, ``ingest``, ``studies``, ``show``."""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING

import click

from warmstart.cli.common import (
    fail, get_archive, json_option, keep_column_option, parse_tags, print_json, print_rows, read_data,
    strict_option,
)
from warmstart.cli.main import main
from warmstart.cli.progress import PROGRESS_TRIALS, Progress

if TYPE_CHECKING:
    import pandas as pd

    from warmstart.space import Space

# `studies` and `show` format DuckDB's rows themselves: this module imports no pandas,
# so they answer in a fraction of a second (examples/bench_cli.py).


#: a trials file this long (about a second's work to check and write) gets a progress bar in `ingest`

@main.command()
@click.option("--starter", is_flag=True, help="Also load the shipped starter history (real studies on open datasets).")
@click.option("--starter-learner", "starter_learners", multiple=True, metavar="LEARNER",
              help="With --starter: only this learner's studies (repeatable).")
@click.pass_context
def init(ctx: click.Context, starter: bool, starter_learners: tuple[str, ...]) -> None:
    """Create the archive (or check an existing one) and print where it is."""
    archive = get_archive(ctx, write=True)
    if starter or starter_learners:
        import sys

        from warmstart.starter import load_starter, read_starter

        total = len(read_starter().tasks)
        with click.progressbar(length=total, label="loading the starter history", file=sys.stderr,
                               show_pos=True) as bar:
            loaded = load_starter(archive, learners=list(starter_learners) or None,
                                  progress=lambda done, total, name: bar.update(done - bar.pos))
        click.echo(f"starter history: {loaded}")
        for name, reason in loaded.skipped:
            click.echo(f"  skipped {name}: {reason}", err=True)
    n = len(archive.studies())
    click.echo(f"archive ready: {archive.path} (schema {archive.schema_version}, {n} studies)")


def _load_space(space_path: str | None, learner: str, data: pd.DataFrame, target: str) -> Space:
    from warmstart.space import Space

    if space_path:
        return Space.load(space_path)
    try:
        from warmstart.evaluate.learners import default_space
        from warmstart.profile import detect_kind
    except ImportError:  # pragma: no cover - learners arrive with the search issue
        fail(f"--space is required for learner {learner!r}")
    return default_space(learner, detect_kind(data[target]))


@main.command()
@click.argument("trials", type=click.Path(dir_okay=False))
@click.option("--task", required=True, help="Task name (stored verbatim).")
@click.option("--data", "data_path", required=True, type=click.Path(dir_okay=False), help="The task's dataset (CSV, TSV, Parquet, JSON lines).")
@click.option("--target", required=True, help="Target column of the dataset.")
@click.option("--learner", required=True, help="Learner key, e.g. svm, gbt, or your own label.")
@click.option("--space", "space_path", type=click.Path(dir_okay=False), help="Space file (.json/.toml); built-in learners have a default.")
@click.option("--metric", default="score", show_default=True,
              help="Name of the metric the scores are in. A built-in metric (accuracy, rmse ...) fixes the "
                   "direction and the valid range of the scores.")
@click.option("--minimize/--maximize", default=None,
              help="Lower (or higher) scores are better; for your own metric names (default: higher is "
                   "better). A built-in metric knows its direction: a contradicting flag is refused.")
@click.option("--owner", help="Who ran the study.")
@click.option("--tag", "tags", multiple=True, metavar="KEY=VALUE", help="Tag the study (repeatable).")
@keep_column_option
@strict_option
@json_option
@click.pass_context
def ingest(ctx, trials, task, data_path, target, learner, space_path, metric, minimize, owner, tags, keep_columns,
           as_json):
    """Add past TRIALS (one column per parameter plus 'score') as a study.

    The whole file goes in as one transaction: on any error nothing is written.
    Scores of a built-in metric outside its range (e.g. accuracy above 1) are refused.
    """
    from warmstart.archive.ingest import study_direction

    tag_map = parse_tags(tags)
    maximize = study_direction(metric, minimize)
    trial_frame = read_data(trials)  # its notes (a guessed delimiter, short rows) too
    # a large file: reading the data, then checking and writing the trials, each a step of a bar
    bar = Progress(f"ingesting {len(trial_frame):,} trials",
                   enabled=len(trial_frame) >= PROGRESS_TRIALS and not as_json)
    bar(0, 2)
    data = read_data(data_path, target, keep_columns=keep_columns)
    space = _load_space(space_path, learner, data, target)
    bar(1, 2)
    from warmstart.cli.remote import server_client

    if (client := server_client(ctx)) is not None:  # the data stays here: its fingerprint and profile go
        from warmstart.client import task_description

        done = client.ingest(trial_frame, task_description(data, target, task, keep_columns=keep_columns,
                                                           source=str(data_path)),
                             learner, space=space.to_dict(), metric=metric, maximize=maximize, tags=tag_map,
                             owner=owner)
        bar(2, 2)
        if as_json:
            print_json(done)
        else:
            click.echo(f"ingested {done['trials']} trials of {learner!r} on task {task!r} as study "
                       f"{done['study_id']} on {client.url} ({done['failed']} failed; best {metric} "
                       f"{done['best_score']:.4g})")
        return
    archive = get_archive(ctx, write=True)
    with archive.transaction():  # one transaction: a refused trials file leaves no task behind either
        if keep_columns:  # the task's profile with the kept columns; ingest then finds the task current
            from warmstart.profile import profile

            archive.add_task(task, data, target, source=str(data_path),
                             profile=profile(data, target=target, keep_columns=keep_columns))
        task_id, study_id, n = archive.ingest(
            trial_frame, task=task, data=data, target=target, learner=learner, space=space, metric=metric,
            maximize=maximize, where=str(trials), source=str(data_path), owner=owner, tags=tag_map,
        )
    bar(2, 2)
    row = archive.study(study_id)
    from warmstart.archive.curate import copies_elsewhere

    copies, others = copies_elsewhere(archive, study_id)
    if copies:
        shown = ", ".join(map(str, others[:5])) + (" ..." if len(others) > 5 else "")
        click.echo(f"warning: {copies} of the {n} trials just ingested are identical to trials of study(ies) {shown} "
                   "(same task data, learner, config and score): was this file ingested before? "
                   "`warmstart curate dedupe` removes the copies and keeps the labels", err=True)
    summary = {
        "task_id": task_id, "task": task, "study_id": study_id, "trials": n,
        "failed": int(row["trial_count"] - row["n_ok"]), "best_score": row["best_score"],
    }
    if as_json:
        print_json(summary)
    else:
        click.echo(
            f"ingested {n} trials of {learner!r} on task {task!r} as study {study_id} "
            f"({summary['failed']} failed; best {metric} {row['best_score']:.4g})"
        )


@main.command()
@click.option("--learner", help="Only studies of this learner.")
@click.option("--task", help="Only studies of this task.")
@click.option("--owner", help="Only studies of this owner.")
@click.option("--tag", "tags", multiple=True, metavar="KEY=VALUE", help="Only studies with this tag (repeatable; all must match).")
@json_option
@click.pass_context
def studies(ctx, learner, task, owner, tags, as_json):
    """List studies: task, learner, metric, trial count, best score."""
    from warmstart.cli.remote import print_remote_studies, server_client

    if (client := server_client(ctx)) is not None:
        return print_remote_studies(client, learner, task, owner, parse_tags(tags), as_json)
    path = ctx.find_root().obj["archive_path"]
    if not Path(path).exists():  # a listing never creates an archive (a mistyped path stays a mistake)
        if as_json:
            print_json([])
        else:
            click.echo(f"no studies yet: there is no archive at {path}; `warmstart init` creates one, "
                       "and `warmstart ingest` or `warmstart tune` fill it")
        return
    archive = get_archive(ctx, write=False)
    everything = archive.study_rows()
    wanted = {"learner": learner, "task": task, "owner": owner}
    want_tags = parse_tags(tags)
    # the filters of warmstart.archive.labels.filter_studies (exact matches; every tag given), on plain rows
    rows = [row for row in everything
            if all(value is None or row[key] == value for key, value in wanted.items())
            and all(row["tags"].get(k) == v for k, v in want_tags.items())]
    cols = ["study_id", "task", "learner", "metric", "direction", "origin", "trial_count", "best_score", "owner", "tags", "created_at"]
    filtered = bool(learner or task or owner is not None or tags)
    empty = ("no study matches these filters (`warmstart studies` without filters lists them all)"
             if filtered and everything else
             "no studies yet: add some with `warmstart ingest` or `warmstart tune`")
    print_rows(rows, cols, as_json, empty=empty)


@main.command()
@click.argument("study", type=int)
@click.option("--top", default=10, show_default=True, type=click.IntRange(min=0),
              help="How many best trials to list (0 = all).")
@json_option
@click.pass_context
def show(ctx, study, top, as_json):
    """Show one STUDY (its id): task, space and its best trials."""
    from warmstart.cli.remote import server_client, show_study

    if (client := server_client(ctx)) is not None:
        return show_study(client, study, top, as_json)
    archive = get_archive(ctx, write=False)
    row = archive.study(study)
    if as_json:
        info = {k: v for k, v in row.items() if k != "space"}
        info["space"] = row["space"].to_dict()
        info["trials"] = archive.trial_table(study).drop(columns=["content_key"]).to_dict(orient="records")
        print_json(info)
        return
    trials = archive.trial_rows(study)
    ok = [t for t in trials if t["status"] == "ok"]
    ok.sort(key=lambda t: t["score"], reverse=row["maximize"])  # stable: ties keep trial order
    if top:
        ok = ok[:top]
    click.echo(f"study {row['study_id']}: {row['learner']} on task {row['task']!r} ({row['origin']})")
    click.echo(f"  metric    {row['metric']} ({row['direction']})")
    click.echo(f"  trials    {row['trial_count']} ({row['trial_count'] - row['n_ok']} failed)")
    failed: dict[str, int] = {}
    for t in trials:
        if t["status"] == "failed":
            text = t["error"] or "no error text"
            failed[text] = failed.get(text, 0) + 1
    for text, n in sorted(failed.items(), key=lambda item: -item[1])[:2]:  # why trials failed, most common first
        click.echo(f"  failure   {n} x {text}")
    best = row["best_score"]
    click.echo(f"  best      {best:.4g}" if not math.isnan(best) else "  best      -")
    if row["owner"]:
        click.echo(f"  owner     {row['owner']}")
    if row["tags"]:
        click.echo("  tags      " + ", ".join(f"{k}={v}" for k, v in row["tags"].items()))
    click.echo("  space     " + "; ".join(f"{p.name}: {p.describe()}" for p in row["space"]))
    click.echo("")
    names = row["space"].names
    cols = ["number"] + names + ["score", "cost_s"]
    print_rows([{**{n: None for n in names}, **t["config"], **t} for t in ok], cols,
               empty="no successful trials")
