"""What the commands accept: upper limits on sizes, and where output may be written.

Each limit is generous for the work a team does, and low enough that a
slip of the keyboard (``--budget 99999999999999999999``) gets a clear
usage error at once instead of a run that prints nothing for hours. The
reason for each is in its option's help.

Output: a command writes at most the one thing it was asked to (a file, or
a folder for a store), inside a directory that exists; it never creates a
chain of missing folders. An archive file may also get its own folder
(``archive/`` of the default ``archive/warmstart.duckdb``), as long as that
folder's parent exists.
"""

from __future__ import annotations

from pathlib import Path

import click

__all__ = [
    "MAX_TRIALS", "MAX_PROPOSALS", "MAX_QUERIES", "MAX_REPEATS", "MAX_QUERIES_PER_TASK", "MAX_WORKERS",
    "OutputFile", "OutputFolder", "missing_folder", "check_archive_folder",
]

#: ``tune --budget``: each proposal of the density search looks at every earlier trial, so one
#: study of 100 000 trials already proposes slowly; beyond that, split the work into studies
MAX_TRIALS = 100_000
#: ``propose -k``: one config per parallel job; each proposal is held as a pending fantasy, so
#: a batch of 1 000 takes seconds and a bigger one would print nothing for minutes
MAX_PROPOSALS = 1_000
#: ``gain --budget`` (each value): the starter's held-out tasks hold 64 to 128 recorded configs,
#: so a replay beyond a few hundred queries only revisits them; a live query trains a model
MAX_QUERIES = 1_000
#: ``gain --repeats``: a bootstrap interval narrows with the square root of the runs: 30 is
#: usual, 1 000 narrows it another 6 times
MAX_REPEATS = 1_000
#: ``gain``: queries per search and held-out task, budgets summed, times the repeats (100 times
#: the usual ``--budget 10 --repeats 30``, which takes minutes on two cores)
MAX_QUERIES_PER_TASK = 30_000
#: ``--workers``: local processes; 256 covers a large machine, a cluster takes more (--cluster)
MAX_WORKERS = 256


def missing_folder(path: str | Path) -> Path | None:
    """The outermost folder on the way to ``path`` that does not exist (None: all exist)."""
    missing = None
    for parent in Path(path).absolute().parents:
        if parent.exists():
            break
        missing = parent
    return missing


class _Output(click.Path):
    """A path a command creates: the directory it goes in must exist (a usage error names it)."""

    kind = "file"

    def convert(self, value, param, ctx):
        value = super().convert(value, param, ctx)
        folder = missing_folder(value)
        if folder is not None:
            self.fail(f"{value}: the directory {folder} does not exist; create it first, or give a {self.kind} in "
                      "an existing directory", param, ctx)
        return value


class OutputFile(_Output):
    """A file a command writes: its directory must exist (a usage error names it)."""

    name = "output file"

    def __init__(self) -> None:
        super().__init__(dir_okay=False, writable=False)


class OutputFolder(_Output):
    """A folder a command creates (or fills, when empty): its parent must exist."""

    name = "output folder"
    kind = "folder"

    def __init__(self) -> None:
        super().__init__()  # an existing file or a used folder: the command's own message says so


def check_archive_folder(path: str) -> None:
    """Refuse (a usage error on ``--archive``) an archive file to be created more than
    one missing folder deep: ``archive/warmstart.duckdb`` may create ``archive/``,
    ``/missing/dir/a.duckdb`` names ``/missing``."""
    if path == ":memory:" or Path(path).exists():
        return
    folder = missing_folder(Path(path).parent)
    if folder is not None:
        raise click.BadParameter(
            f"{path}: the directory {folder} does not exist; create it first, or give an archive path in an "
            "existing directory (a new archive may create only its own folder)", param_hint="'--archive'")
