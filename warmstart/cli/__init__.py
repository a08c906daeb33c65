"""The ``warmstart`` command line (click).

The group in :mod:`warmstart.cli.main` opens the archive and hands it to the
subcommands; each area's commands live in their own module, which registers
them on ``main`` and is imported when one of its commands runs
(``main.COMMAND_MODULES``).
"""

from warmstart.cli.main import main

__all__ = ["main"]
