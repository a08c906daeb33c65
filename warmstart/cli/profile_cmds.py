"""Commands about tasks and their likeness: ``profile``, ``neighbors``, ``defaults``."""

from __future__ import annotations

import json

import click
import pandas as pd

from warmstart.cli.common import (
    get_archive, json_option, keep_column_option, print_json, print_table, profile_table, read_data, strict_option,
)
from warmstart.cli.main import main
from warmstart.profile import FEATURE_GROUPS, PROFILE_VERSION, detect_kind

_kind_option = click.option(
    "--kind",
    type=click.Choice(["classification", "regression"]),
    help="Task kind (detected from the target when omitted).",
)


def _profile_file(path: str, target: str, kind: str | None, keep_columns=()) -> tuple[dict[str, float], str]:
    """Read a table and profile it, with progress on stderr for big tables."""
    frame = read_data(path, target, keep_columns=keep_columns)
    kind = kind or detect_kind(frame[target])
    _warn_odd_target(frame[target], target, kind)
    return profile_table(frame, target, path, kind, keep_columns), kind


def _warn_odd_target(y: pd.Series, target: str, kind: str) -> None:
    """Warn (stderr) about a classification target that looks like an identifier or a measurement."""
    if kind != "classification":
        return
    y = y.dropna()
    n_classes = y.nunique()
    if len(y) and n_classes > max(20, len(y) // 2):
        click.echo(f"note: target {target!r} has {n_classes} classes in {len(y)} rows; is it an identifier "
                   "or a measurement? (a regression target is profiled with --kind regression)", err=True)


def _echo_notes(frame: pd.DataFrame) -> None:
    for note in frame.attrs.get("notes", []):
        click.echo(f"note: {note}", err=True)


@main.command("profile")
@click.argument("data", type=click.Path(dir_okay=False))
@click.option("--target", required=True, help="Target column of the table.")
@_kind_option
@keep_column_option
@strict_option
@json_option
def profile_command(data, target, kind, keep_columns, as_json):
    """Print the meta-features of DATA (CSV, TSV, Parquet or JSON lines).

    Columns that look like row identifiers are left out and dates written as
    text count as days (a note on stderr names each); --keep-column keeps one.
    """
    prof, kind = _profile_file(data, target, kind, keep_columns)
    if as_json:
        print_json({"data": data, "target": target, "kind": kind, "profile_version": PROFILE_VERSION, "profile": prof})
        return
    table = pd.DataFrame(
        {"meta_feature": list(prof), "group": [FEATURE_GROUPS.get(f, "") for f in prof], "value": list(prof.values())}
    )
    click.echo(f"{kind} task, target {target!r}, profile version {PROFILE_VERSION}", err=True)
    print_table(table)


@main.command("neighbors")
@click.argument("data", type=click.Path(dir_okay=False))
@click.option("--target", required=True, help="Target column of the table.")
@click.option("--learner", required=True, help="Only past tasks with studies of this learner.")
@click.option("-k", "k", default=5, show_default=True, type=click.IntRange(min=1), help="How many neighbors.")
@_kind_option
@keep_column_option
@strict_option
@json_option
@click.pass_context
def neighbors_command(ctx, data, target, learner, k, kind, keep_columns, as_json):
    """List the past tasks most similar to DATA that have studies of a learner.

    The similarity column is what a prior for DATA (`warmstart prior`, a warm
    `tune`) weights each task's studies by, before normalising over them.
    """
    from warmstart.cli.remote import server_client

    archive = server_client(ctx) or get_archive(ctx, write=False)
    prof, _ = _profile_file(data, target, kind, keep_columns)
    frame = archive.neighbors(prof, learner=learner, k=k)
    _echo_notes(frame)
    if not as_json:
        frame = frame.assign(study_ids=[",".join(str(s) for s in ids) for ids in frame["study_ids"]])
    print_table(frame, as_json)


@main.command("defaults")
@click.option("--learner", required=True, help="Learner whose configs to rank.")
@click.option("--near", "near", type=click.Path(dir_okay=False), help="Weight past tasks by similarity to this table.")
@click.option("--target", help="Target column of the --near table.")
@click.option("-n", "n", default=10, show_default=True, type=click.IntRange(min=1), help="How many configs.")
@_kind_option
@keep_column_option
@strict_option
@json_option
@click.pass_context
def defaults_command(ctx, learner, near, target, n, kind, keep_columns, as_json):
    """List configs of a learner that ranked well across many past tasks."""
    if near and not target:
        raise click.UsageError("--near needs --target (the target column of that table)")
    if target and not near:
        raise click.UsageError("--target goes with --near DATA; give both or neither")
    if keep_columns and not near:
        raise click.UsageError("--keep-column names a column of the --near table; give --near DATA --target COL")
    from warmstart.cli.remote import server_client

    client = server_client(ctx)
    archive = client or get_archive(ctx, write=False)
    empty = f"no successful trials of {learner!r} in the archive"
    if client is not None and not near:  # the service ranks one kind of task, or all
        frame = client.defaults(learner, n=n, kind=kind)
        if not as_json:
            frame = frame.assign(config=[json.dumps(c, sort_keys=True) for c in frame["config"]])
        print_table(frame, as_json, empty=empty)
        return
    if near:
        frame = archive.defaults(learner, near=_profile_file(near, target, kind, keep_columns)[0], n=n)
        _echo_notes(frame)
        if not as_json:
            frame = frame.assign(config=[json.dumps(c, sort_keys=True) for c in frame["config"]])
        print_table(frame, as_json, empty=empty)
        return
    # without --near, rank each kind of task apart: a learner's parameters can differ by kind
    studies = archive.studies()
    tasks = archive.tasks()
    kinds = [kind] if kind else sorted(tasks.loc[tasks["task_id"].isin(
        studies.loc[studies["learner"] == learner, "task_id"]), "kind"].unique())
    frames = []
    for k in kinds or [None]:
        frame = archive.defaults(learner, n=n, kind=k)
        _echo_notes(frame)
        frames.append(frame.assign(kind=k) if k else frame)
    if as_json:
        print_table(pd.concat(frames, ignore_index=True), True, empty=empty)
        return
    for k, frame in zip(kinds or [None], frames):
        if k and len(kinds) > 1:
            click.echo(f"{k} tasks:")
        frame = frame.drop(columns=["kind"], errors="ignore")
        print_table(frame.assign(config=[json.dumps(c, sort_keys=True) for c in frame["config"]]), False,
                    empty=f"no successful trials of {learner!r} on {k} tasks" if k else empty)
