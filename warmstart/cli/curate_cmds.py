"""Commands that curate the team's history: ``curate check|dedupe|merge|prune|
export|import|salvage`` and ``tag``. Thin: parse, call :mod:`warmstart.archive.curate`
or :mod:`warmstart.archive.merge` / :mod:`warmstart.archive.exchange`, print."""

from __future__ import annotations

import contextlib
import sys
from typing import Iterator

import click

from warmstart.archive.curate import (
    DEDUPE_STEPS,
    PRUNE_STEPS,
    apply_prune,
    check_archive,
    dedupe_trials,
    fix_archive,
    label_study,
    plan_prune,
    trial_total,
)
from warmstart.archive.exchange import export_archive, import_export
from warmstart.archive.faults import translated
from warmstart.archive.merge import MERGE_STEPS, merge_archive
from warmstart.cli.common import get_archive, json_option, parse_tags, print_json, print_table
from warmstart.cli.limits import OutputFolder
from warmstart.cli.main import main
from warmstart.cli.progress import PROGRESS_TRIALS, Progress
from warmstart.errors import ArchiveDamagedError, ArchiveError, ArchiveLockedError

_SHOW = 20  # studies listed by prune before "... and N more"


@contextlib.contextmanager
def _steps(label: str, enabled: bool = True, steps: tuple[str, ...] = MERGE_STEPS) -> Iterator:
    """A progress bar on stderr advanced once per step (a merge's or import's by default)."""
    if not enabled:
        yield None
        return
    with click.progressbar(
        length=len(steps), label=label, file=sys.stderr,
        item_show_func=lambda step: step or "", show_eta=True,
    ) as bar:
        seen: list[str] = []

        def advance(step: str) -> None:
            if seen:
                bar.update(1, seen[-1])
            seen.append(step)

        yield advance
        if seen:
            bar.update(1, "done")


@main.group()
def curate() -> None:
    """Check, clean up, merge, prune, export, import and salvage the archive."""


#: exit statuses of `curate check` (click itself exits 2 on a usage error)
CHECK_SOUND, CHECK_UNSOUND, CHECK_BUSY, CHECK_DAMAGED, CHECK_CANNOT = 0, 1, 3, 4, 5


@curate.command(epilog="""\b
Exit status:
  0  sound: no check found anything
  1  unsound: findings left (--fix repairs those marked so)
  2  usage error (a wrong option)
  3  busy: another process is writing to the archive; run again when it is done
  4  damaged: a block of the file cannot be read; `warmstart curate salvage` copies what can be
  5  cannot check: no archive at that path, or the file is not a warmstart archive""")
@click.option("--fix", is_flag=True, help="Repair the safe cases (one transaction) and say what was done.")
@json_option
@click.pass_context
def check(ctx, fix, as_json):
    """Check the archive's integrity; the exit status says what was found (below).

    Reads every block of the file first (a damaged file is reported as such
    and never repaired), then looks for orphan rows, trials outside their
    study's space, non-finite scores marked ok, scores impossible for a
    built-in metric, duplicate trials (copies of an earlier study's),
    profile-version mismatches, studies without trials and tasks without
    profiles (and a few more). Identical repeats within one study are
    repeated evaluations: a note, not a problem.
    """
    path = ctx.find_root().obj["archive_path"]
    try:
        with translated(path):  # a lock or damage DuckDB reports mid-way gets its status too
            archive = get_archive(ctx, write=fix)
            report, fixed = _check_and_fix(archive, fix, as_json)
    except ArchiveLockedError as exc:
        _check_failed(ctx, path, "busy", CHECK_BUSY, exc, as_json)
    except ArchiveDamagedError as exc:
        _check_failed(ctx, path, "damaged", CHECK_DAMAGED, exc, as_json)
    except ArchiveError as exc:
        _check_failed(ctx, path, "cannot check", CHECK_CANNOT, exc, as_json)
    if as_json:
        findings = [{"check": f.check, "count": f.count, "fixable": f.fixable, "what": f.what,
                     "examples": list(f.examples)} for f in report.findings]
        print_json({"archive": archive.path, "ok": report.ok, "status": "sound" if report.ok else "unsound",
                    "fixed": [{"what": w, "rows": n} for w, n in fixed],
                    "findings": findings, "notes": report.notes})
    else:
        _print_check(archive, report, fixed, fix)
    if not report.ok:
        ctx.exit(CHECK_UNSOUND)


def _check_and_fix(archive, fix: bool, as_json: bool):
    """Check (with a progress bar unless JSON), repair when asked, check again."""
    if as_json:
        report = check_archive(archive)
    else:
        with click.progressbar(length=1, label="validating configs", file=sys.stderr) as bar:

            def progress(done: int, total: int) -> None:
                bar.length = max(total, 1)
                bar.update(done - bar.pos)

            report = check_archive(archive, progress=progress)
    fixed: list[tuple[str, int]] = []
    if fix and not report.ok:
        fixed = fix_archive(archive)
        report = check_archive(archive)
    return report, fixed


def _check_failed(ctx, path: str, status: str, code: int, exc: Exception, as_json: bool) -> None:
    """Stop `curate check` with its own exit status: the message on stderr (and JSON on stdout)."""
    if as_json:
        unreadable = [{"table": t, "column": c, "detail": d} for t, c, d in getattr(exc, "unreadable", ())]
        print_json({"archive": path, "ok": False, "status": status, "error": str(exc), "unreadable": unreadable})
    click.echo(f"Error: {exc}", err=True)
    ctx.exit(code)


def _print_check(archive, report, fixed, fix: bool) -> None:
    notes = report.notes
    click.echo(f"archive {archive.path}: {notes['tasks']} tasks, {notes['studies']} studies, {notes['trials']} trials")
    for what, n in fixed:
        click.echo(f"fixed: {what}: {n}")
    for f in report.findings:
        mark = "ok" if f.count == 0 else str(f.count)
        hint = "" if f.count == 0 else ("  [--fix repairs this]" if f.fixable else "  [needs you]")
        click.echo(f"  {mark:>7}  {f.check:<26} {f.what}{hint}")
        for example in f.examples:
            click.echo(f"           {'':<26} e.g. {example}")
    if notes["repeated_configs_other_result"]:
        click.echo(f"note: {notes['repeated_configs_other_result']} config(s) were evaluated more than once "
                   "with different results (kept: repeated evaluations are information)")
    if notes["repeated_evaluations_same_result"]:
        click.echo(f"note: {notes['repeated_evaluations_same_result']} trial(s) repeat a config of their own "
                   "study with the same result (kept: repeated evaluations, not duplicates)")
    if notes["spaces_without_studies"]:
        click.echo(f"note: {notes['spaces_without_studies']} space(s) are used by no study")
    if report.ok:
        click.echo("archive is sound")
    else:
        tail = "" if fix else " (`warmstart curate check --fix` repairs those marked so)"
        click.echo(f"{len(report.problems)} kind(s) of problem found{tail}")


@curate.command(epilog="""\b
Exit status:
  0  every row was copied (the file read cleanly)
  1  nothing was done (DAMAGED missing, held by a writer, unreadable from its header; NEW exists ...)
  2  usage error (a wrong option)
  4  NEW was written, but some rows of DAMAGED could not be read (the report says which)""")
@click.argument("damaged", metavar="DAMAGED", type=click.Path(dir_okay=False))
@click.argument("new", metavar="NEW", type=click.Path(dir_okay=False))
@json_option
@click.pass_context
def salvage(ctx, damaged, new, as_json):
    """Copy every table and row that can be read from the DAMAGED archive into a NEW one.

    DAMAGED is only read (attached read-only); NEW must not exist yet (its
    directory must) and appears only when the copy is complete, with a fresh
    schema and the damaged archive's id. Rows are copied whole or not at all;
    the report says, per table, how many rows were copied and how many could
    not be read (and for trials, of which studies). Afterwards, `warmstart
    --archive NEW curate check` lists what the lost rows leave behind.
    """
    from warmstart.archive.salvage import salvage_archive

    with _salvage_progress(not as_json) as progress:
        report = salvage_archive(damaged, new, progress=progress)
    if as_json:
        print_json(report.to_dict())
    else:
        for line in report.lines():
            click.echo(line)
    if not report.complete:
        ctx.exit(CHECK_DAMAGED)


@contextlib.contextmanager
def _salvage_progress(enabled: bool) -> Iterator:
    """A progress bar on stderr for each table copied piece by piece (a clean table is one step)."""
    if not enabled:
        yield None
        return
    with contextlib.ExitStack() as stack:
        current: dict = {}

        def advance(table: str, done: int, total: int) -> None:
            if current.get("table") != table:
                stack.close()  # the previous table's bar ends
                current.update(table=table, bar=stack.enter_context(
                    click.progressbar(length=total, label=f"salvaging {table}", file=sys.stderr)))
            bar = current["bar"]
            bar.update(done - bar.pos)

        yield advance


@curate.command()
@click.option("--dry-run", is_flag=True, help="Only count what would go.")
@json_option
@click.pass_context
def dedupe(ctx, dry_run, as_json):
    """Drop trials that repeat an earlier study's trials (the same file imported twice).

    A duplicate shares task data, learner, config, metric, status and score
    with a trial of an earlier study (by creation time, then id); that study
    keeps its copies. Repeats within one study are repeated evaluations and
    stay, as does a repeated evaluation with another score. A study left with
    no trials goes, and its tags (and owner, if the kept study has none) move
    to the study that keeps its trials.
    """
    archive = get_archive(ctx, write=not dry_run)
    big = not (as_json or dry_run) and trial_total(archive) >= PROGRESS_TRIALS
    with _steps("deduplicating", big, DEDUPE_STEPS) as progress:
        trials, studies = dedupe_trials(archive, dry_run=dry_run, progress=progress)
    if as_json:
        print_json({"dry_run": dry_run, "trials_removed": trials, "studies_removed": studies})
        return
    verb = "would remove" if dry_run else "removed"
    click.echo(f"{verb} {trials} duplicate trial(s), keeping the earliest study's copies"
               + (f"; {verb} {studies} study(ies) that held only duplicates" if studies else ""))


def _summary(summary, as_json: bool) -> None:
    if as_json:
        print_json(summary.to_dict())
    else:
        for line in summary.lines():
            click.echo(line)


@curate.command()
@click.argument("other", metavar="OTHER")
@json_option
@click.pass_context
def merge(ctx, other, as_json):
    """Merge the archive file OTHER (a teammate's) into this one.

    Tasks are matched by dataset fingerprint, spaces by learner and content.
    A trial that copies a study's trial here is skipped; repeated evaluations
    inside one study are kept. One transaction; OTHER is only read. Merging
    the same archive twice adds nothing.
    """
    archive = get_archive(ctx, write=True)
    with _steps("merging", not as_json) as progress:
        summary = merge_archive(archive, other, progress=progress)
    _summary(summary, as_json)


@curate.command()
@click.option("--failed", is_flag=True, help="Failed trials (of the studies the other filters select).")
@click.option("--before", metavar="DATE", help="Studies created before DATE (ISO 8601, e.g. 2026-01-31).")
@click.option("--learner", help="Studies of this learner.")
@click.option("--tag", "tags", multiple=True, metavar="KEY=VALUE", help="Studies with this tag (repeatable; all must match).")
@click.option("--owner", help="Studies of this owner.")
@click.option("--yes", is_flag=True, help="Do not ask for confirmation.")
@json_option
@click.pass_context
def prune(ctx, failed, before, learner, tags, owner, yes, as_json):
    """Remove studies (or only their failed trials) chosen by filters.

    Filters combine with AND. Shows what would go and asks first (or --yes);
    everything goes in one transaction.
    """
    tag_map = parse_tags(tags)
    archive = get_archive(ctx, write=True)
    plan = plan_prune(archive, failed=failed, before=before, learner=learner, tags=tag_map, owner=owner)
    if plan.studies.empty:
        if as_json:
            print_json({"trials_removed": 0, "studies_removed": 0, "studies": []})
        else:
            click.echo("nothing matches: nothing to remove")
        return
    what = "failed trials" if plan.failed_only else "trials"
    head = f"would remove {plan.trial_count} {what} and {plan.n_studies} whole study(ies):"
    if not as_json:
        click.echo(head)
        shown = plan.studies.head(_SHOW).rename(columns={"remove": "trials_to_remove", "emptied": "whole_study"})
        print_table(shown)
        if len(plan.studies) > _SHOW:
            click.echo(f"... and {len(plan.studies) - _SHOW} more studies")
    if not yes:
        click.confirm("Remove them?", abort=True, err=True)
    with _steps("pruning", not as_json and plan.trial_count >= PROGRESS_TRIALS, PRUNE_STEPS) as progress:
        trials, studies = apply_prune(archive, plan, progress=progress)
    if as_json:
        print_json({"trials_removed": trials, "studies_removed": studies,
                    "studies": plan.studies.to_dict(orient="records")})
    else:
        click.echo(f"removed {trials} {what} and {studies} whole study(ies)")


@curate.command("export")
@click.argument("directory", metavar="DIR", type=OutputFolder())
@json_option
@click.pass_context
def export_cmd(ctx, directory, as_json):
    """Export the archive to DIR as Parquet partitioned by learner, plus a manifest.

    DIR must be new (or empty), in a directory that exists. DuckDB queries the store in place, e.g.
    SELECT * FROM read_parquet('DIR/trials/**/*.parquet', hive_partitioning = true).
    """
    archive = get_archive(ctx, write=False)
    manifest = export_archive(archive, directory, progress=Progress(f"exporting to {directory}", enabled=not as_json))
    if as_json:
        print_json(manifest)
        return
    c = manifest["counts"]
    click.echo(f"exported {c['tasks']} tasks, {c['spaces']} spaces, {c['studies']} studies and {c['trials']} trials "
               f"to {directory} (trials partitioned by learner; schema {manifest['schema_version']})")
    if manifest["orphan_trials_left_out"]:
        click.echo(f"left out {manifest['orphan_trials_left_out']} orphan trial(s) with no study "
                   "(`warmstart curate check` lists them)")


@curate.command("import")
@click.argument("directory", metavar="DIR")
@json_option
@click.pass_context
def import_cmd(ctx, directory, as_json):
    """Import a store written by `curate export` (a merge: same dedupe rules)."""
    archive = get_archive(ctx, write=True)
    with _steps("importing", not as_json) as progress:
        summary = import_export(archive, directory, progress=progress)
    _summary(summary, as_json)


@main.command("tag")
@click.argument("study", type=int)
@click.argument("labels", nargs=-1, metavar="[KEY=VALUE]...")
@click.option("--owner", help="Set the study's owner ('' clears it).")
@click.option("--remove", multiple=True, metavar="KEY", help="Remove a tag (repeatable).")
@json_option
@click.pass_context
def tag(ctx, study, labels, owner, remove, as_json):
    """Tag STUDY with KEY=VALUE pairs and/or set its owner."""
    if not labels and owner is None and not remove:
        raise click.UsageError("give KEY=VALUE tags, --owner NAME or --remove KEY")
    try:
        tags = parse_tags(labels)
    except click.BadParameter as exc:
        exc.param_hint = "'[KEY=VALUE]...'"
        raise
    from warmstart.cli.remote import server_client

    if (client := server_client(ctx)) is not None:
        result = client.tag(study, tags=tags, remove=remove, owner=owner)
    else:
        result = label_study(get_archive(ctx, write=True), study, tags=tags, owner=owner, remove=remove)
    if as_json:
        print_json(result)
        return
    shown = ", ".join(f"{k}={v}" for k, v in result["tags"].items()) or "(no tags)"
    click.echo(f"study {study}: owner {result['owner'] if result['owner'] is not None else '-'}; tags {shown}")


__all__ = ["curate", "tag"]
