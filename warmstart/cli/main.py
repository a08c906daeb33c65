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
