"""The ``warmstart`` click group: shared options and error handling."""

from __future__ import annotations

import importlib

import click

from warmstart._version import __version__
from warmstart.archive.location import DEFAULT_ARCHIVE
from warmstart.errors import WarmstartError

__all__ = ["main"]


#: command name -> module of ``warmstart.cli`` that defines it. A command's
#: module is imported only when that command runs (or ``--help`` lists it), so
#: ``warmstart --version`` or ``studies`` do not pay for SciPy or scikit-learn.
#: A new command adds one line here (tests/test_cli_archive.py checks the table).
COMMAND_MODULES = {
    "init": "archive_cmds", "ingest": "archive_cmds", "studies": "archive_cmds", "show": "archive_cmds",
    "prior": "transfer_cmds", "gain": "transfer_cmds",
    "demo": "demo_cmds",
    "profile": "profile_cmds", "neighbors": "profile_cmds", "defaults": "profile_cmds",
    "tune": "tune_cmds", "propose": "tune_cmds", "record": "tune_cmds",
    "curate": "curate_cmds", "tag": "curate_cmds",
    "serve": "serve_cmds",
}

#: each command's one-line help, so that ``warmstart --help`` lists the commands without
#: importing their modules (seconds of pandas, SciPy and scikit-learn); it is the first line
#: of the command's docstring (tests/test_quick_commands.py checks that they agree)
COMMAND_HELP = {
    "curate": "Check, clean up, merge, prune, export, import and salvage the archive.",
    "defaults": "List configs of a learner that ranked well across many past tasks.",
    "demo": "Run the whole job on an invented grocery cooperative (fixed seed).",
    "gain": "Measure, in bits, whether warm starts beat cold ones on your history.",
    "ingest": "Add past TRIALS (one column per parameter plus 'score') as a study.",
    "init": "Create the archive (or check an existing one) and print where it is.",
    "neighbors": "List the past tasks most similar to DATA that have studies of a learner.",
    "prior": "Build a prior for a new dataset DATA from similar past studies.",
    "profile": "Print the meta-features of DATA (CSV, TSV, Parquet or JSON lines).",
    "propose": "Propose the next config(s) of a STUDY whose trials run elsewhere.",
    "record": "Record the result of one config of a STUDY (committed at once).",
    "serve": "Serve the archive to the team over HTTP: one process owns the file.",
    "show": "Show one STUDY (its id): task, space and its best trials.",
    "studies": "List studies: task, learner, metric, trial count, best score.",
    "tag": "Tag STUDY with KEY=VALUE pairs and/or set its owner.",
    "tune": "Tune LEARNER on DATA and record every trial in the archive as it finishes.",
}


class _Group(click.Group):
    """The top group: loads a command's module on first use, and turns
    library errors into clean messages (exit code 1).

    A DuckDB error that says the archive file is locked, not a database or
    damaged (:mod:`warmstart.archive.faults`) gets the same treatment, naming
    the file, whichever command met it; any other DuckDB error is a bug and
    keeps its traceback.
    """
    def get_command(self, ctx: click.Context, name: str):
        if name not in self.commands and name in COMMAND_MODULES:
            importlib.import_module(f"warmstart.cli.{COMMAND_MODULES[name]}")
        return super().get_command(ctx, name)

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(set(self.commands) | set(COMMAND_MODULES))

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        """The command list of ``--help``: a command not loaded yet shows its line of
        :data:`COMMAND_HELP` (its module is not imported just to be listed)."""
        names = self.list_commands(ctx)
        if not names:
            return
        limit = formatter.width - 6 - max(len(name) for name in names)
        rows = []
        for name in names:
            if name in self.commands or name not in COMMAND_HELP:
                cmd = self.get_command(ctx, name)
                if cmd is None or cmd.hidden:
                    continue
                rows.append((name, cmd.get_short_help_str(limit)))
            else:
                stand_in = click.Command(name, help=COMMAND_HELP[name])  # shortened as click shortens the real one
                rows.append((name, stand_in.get_short_help_str(limit)))
        with formatter.section("Commands"):
            formatter.write_dl(rows)

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except WarmstartError as exc:
            raise click.ClickException(str(exc)) from None
        except Exception as exc:
            from warmstart.archive.faults import archive_error  # DuckDB is imported only when one failed

            error = archive_error(exc, (ctx.obj or {}).get("archive_path", "the archive"))
            if error is None:
                raise
            raise click.ClickException(str(error)) from None


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.option(
    "--archive",
    "archive_path",
    envvar="WARMSTART_ARCHIVE",
    default=DEFAULT_ARCHIVE,
    show_default=True,
    metavar="PATH",
    help="Archive file (DuckDB). Also from the environment variable WARMSTART_ARCHIVE.",
)
@click.option(
    "--server",
    envvar="WARMSTART_SERVER",
    metavar="URL",
    help="Talk to a team service (warmstart serve) instead of an archive file: studies, show, neighbors, "
         "defaults, prior, ingest, tag, propose, record, tune. Also from WARMSTART_SERVER; the token from "
         "WARMSTART_TOKEN.",
)
@click.option(
    "--wait",
    "wait_seconds",
    default=5.0,
    show_default=True,
    type=click.FloatRange(min=0),
    metavar="SECONDS",
    help="How long to wait for the archive file while another process holds it (a tune holds it only while "
         "it writes) before giving up; `warmstart serve` shares one archive among many processes.",
)
@click.version_option(__version__, prog_name="warmstart")
@click.pass_context
def main(ctx: click.Context, archive_path: str, server: str | None, wait_seconds: float) -> None:
    """Keep your team's tuning history, start new searches from what worked on
    similar tasks, and measure in bits whether that helped."""
    ctx.ensure_object(dict)
    ctx.obj["archive_path"] = archive_path
    ctx.obj["server"] = server
    ctx.obj["wait"] = wait_seconds
