"""The ``warmstart`` command line (click).

The group in :mod:`warmstart.cli.main` opens the archive and hands it to the
subcommands; each area's commands live in their own module and are
registered here, one line each.
"""

from warmstart.cli.main import main

# Command modules register themselves on ``main`` when imported (one line each).
from warmstart.cli import archive_cmds  # noqa: E402,F401  init, ingest, studies, show
from warmstart.cli import transfer_cmds  # noqa: E402,F401  prior, gain
from warmstart.cli import demo_cmds  # noqa: E402,F401  demo
from warmstart.cli import profile_cmds  # noqa: E402,F401  profile, neighbors, defaults
from warmstart.cli import tune_cmds  # noqa: E402,F401  tune, propose, record
from warmstart.cli import curate_cmds  # noqa: E402,F401  curate check/dedupe/merge/prune/export/import, tag
from warmstart.cli import serve_cmds  # noqa: E402,F401  serve

__all__ = ["main"]
