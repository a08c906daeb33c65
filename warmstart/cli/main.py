"""The ``warmstart`` click group: shared options and error handling."""

from __future__ import annotations

import click

from warmstart._version import __version__
from warmstart.archive.store import DEFAULT_ARCHIVE
from warmstart.errors import WarmstartError

__all__ = ["main"]


class _Group(click.Group):
    """A group that turns library errors into clean messages (exit code 1).

    A DuckDB error that says the archive file is locked, not a database or
    damaged (:mod:`warmstart.archive.faults`) gets the same treatment, naming
    the file, whichever command met it; any other DuckDB error is a bug and
    keeps its traceback.
    """

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
@click.version_option(__version__, prog_name="warmstart")
@click.pass_context
def main(ctx: click.Context, archive_path: str) -> None:
    """Keep your team's tuning history, start new searches from what worked on
    similar tasks, and measure in bits whether that helped."""
    ctx.ensure_object(dict)
    ctx.obj["archive_path"] = archive_path
