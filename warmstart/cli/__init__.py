"""The ``warmstart`` command line (click).

The group in :mod:`warmstart.cli.main` opens the archive and hands it to the
subcommands; each area's commands live in their own module and are
registered here, one line each.
"""

from warmstart.cli.main import main

# Command modules register themselves on ``main`` when imported (one line each).
from warmstart.cli import archive_cmds  # noqa: E402,F401  init, ingest, studies, show

__all__ = ["main"]
