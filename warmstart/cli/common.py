"""Helpers shared by the command modules: the open archive, tables, errors."""

from __future__ import annotations

import contextlib
import json
import math
import shlex
import signal
import sys
import threading
from typing import TYPE_CHECKING, Any, Sequence

import click

from warmstart.text import is_missing, table_lines

if TYPE_CHECKING:
    import pandas as pd

    from warmstart.archive.store import Archive

# No pandas, numpy or DuckDB at import: `studies`, `show` and `--version` load only what they use
# (tests/test_quick_commands.py). A value of numpy or pandas type can only exist once that library
# was imported, so to_jsonable looks for those types in sys.modules (and warmstart.text's cells too).

__all__ = [
    "get_archive", "release_archive", "wait_seconds", "print_table", "print_rows", "print_json", "profile_table", "PROGRESS_CELLS", "fail", "json_option", "keep_column_option",
    "parse_tags", "read_data", "strict_option", "to_jsonable",
]

json_option = click.option("--json", "as_json", is_flag=True, help="Print JSON instead of a table.")
#: the data file's columns to use as features as written (passed on as ``keep_columns``)
keep_column_option = click.option(
    "--keep-column", "keep_columns", multiple=True, metavar="NAME",
    help="Use this column of the data as a feature as it is written, even if it looks like a row "
         "identifier (left out) or dates written as text (turned into days); repeatable.",
)

_STRICT = "warmstart.strict"  # key in click's ``ctx.meta`` (shared by every context of one command line)


def _remember_strict(ctx: click.Context, param: click.Parameter, value: bool) -> bool:
    if value:
        ctx.meta[_STRICT] = True
    return value


#: ``--strict`` for a command that reads a data file: every note about the file
#: becomes an error (:func:`read_data` reads the flag; the command never sees it)
strict_option = click.option(
    "--strict", is_flag=True, expose_value=False, callback=_remember_strict,
    help="Refuse the data file, instead of printing a note, when reading it would guess, leave out, merge "
         "or convert anything (short rows, rows without a target, labels differing only in case or spaces, "
         "infinite values, columns left out ...); nothing is written to the archive.",
)


def get_archive(ctx: click.Context, write: bool = True) -> Archive:
    """The archive named by ``--archive``, opened once per command and closed
    when the command ends. ``write=False`` opens it read-only. While another
    process holds the file, waits up to ``--wait`` seconds
    (:func:`~warmstart.archive.turns.open_archive`)."""
    root = ctx.find_root()
    root.ensure_object(dict)
    from warmstart.archive.turns import open_archive
    from warmstart.cli.limits import check_archive_folder

    cached = root.obj.get("archive")
    if cached is not None and (write is False or not cached.read_only):
        return cached
    if cached is not None:
        cached.close()
    if write:
        check_archive_folder(root.obj["archive_path"])
    archive = open_archive(root.obj["archive_path"], read_only=not write, wait=wait_seconds(ctx))
    root.obj["archive"] = archive
    root.call_on_close(archive.close)
    return archive


def wait_seconds(ctx: click.Context) -> float:
    """The group's ``--wait SECONDS`` (the default when the group was not run, e.g. in a test)."""
    obj = ctx.find_root().obj or {}
    from warmstart.archive.turns import DEFAULT_WAIT_SECONDS

    return float(obj.get("wait", DEFAULT_WAIT_SECONDS))


def release_archive(ctx: click.Context) -> str:
    """Close the command's archive now (a later :func:`get_archive` opens it again); returns its path."""
    root = ctx.find_root()
    archive = (root.obj or {}).pop("archive", None)
    if archive is not None:
        archive.close()
    return root.obj["archive_path"]


def parse_tags(values: tuple[str, ...]) -> dict[str, str]:
    """``KEY=VALUE`` texts (``--tag`` options) as a dict; a text without ``=`` or
    with an empty key is a :class:`click.BadParameter` naming it."""
    tags = {}
    for item in values:
        if "=" not in item:
            raise click.BadParameter(f"{item!r} is not KEY=VALUE (e.g. team=retail)", param_hint="--tag")
        key, value = item.split("=", 1)
        if not key:
            raise click.BadParameter(f"{item!r} has an empty key; use KEY=VALUE", param_hint="--tag")
        tags[key] = value
    return tags


def fail(message: str) -> None:
    """Stop the command with a clean error message (exit code 1)."""
    raise click.ClickException(message)


def to_jsonable(value: Any) -> Any:
    """Plain JSON value for numpy/pandas scalars, timestamps and containers."""
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    np = sys.modules.get("numpy")
    if np is not None:
        if isinstance(value, np.generic):
            value = value.item()
        elif isinstance(value, np.ndarray):
            return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if is_missing(value):
        return None
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return value


def print_json(value: Any) -> None:
    """Print a value as indented JSON on stdout."""
    click.echo(json.dumps(to_jsonable(value), indent=2))


#: a table of at least this many cells is profiled with a progress bar on stderr (a few seconds)
PROGRESS_CELLS = 200_000


def profile_table(frame: pd.DataFrame, target: str, path: str, kind: str | None = None,
                  keep_columns=()) -> dict[str, float]:
    """The profile of a data table read from ``path``; a big table (``PROGRESS_CELLS``)
    gets a progress bar on stderr, one step per group of meta-features."""
    from warmstart.cli.progress import Progress
    from warmstart.profile import detect_kind, profile

    kind = kind or detect_kind(frame[target])
    if frame.shape[0] * frame.shape[1] < PROGRESS_CELLS:
        return profile(frame, target=target, kind=kind, keep_columns=keep_columns)
    steps = 5 if kind == "regression" else 4  # groups reported by profile(progress=...)
    bar = Progress(f"profiling {path} ({frame.shape[0]:,} rows x {frame.shape[1]} columns)")
    bar(0, steps)
    done = iter(range(1, steps + 1))
    return profile(frame, target=target, kind=kind, keep_columns=keep_columns,
                   progress=lambda group: bar(min(next(done, steps), steps), steps))


def print_rows(rows: Sequence[dict], columns: Sequence[str], as_json: bool = False,
               empty: str = "(nothing to show)") -> None:
    """Print plain rows (dicts) as an aligned text table of ``columns``, or as
    JSON records of those columns; no pandas needed."""
    if as_json:
        print_json([{c: row.get(c) for c in columns} for row in rows])
        return
    if not rows:
        click.echo(empty)
        return
    for text in table_lines(columns, [[row.get(c) for c in columns] for row in rows]):
        click.echo(text)


def print_table(frame: pd.DataFrame, as_json: bool = False, empty: str = "(nothing to show)") -> None:
    """Print a DataFrame as an aligned text table, or as JSON records."""
    if as_json:
        print_json(frame.to_dict(orient="records"))
        return
    if frame.empty:
        click.echo(empty)
        return
    from pandas.api.types import is_numeric_dtype

    numeric = [is_numeric_dtype(frame[c]) for c in frame.columns]
    for text in table_lines(list(frame.columns), list(frame.itertuples(index=False)), numeric):
        click.echo(text)


def read_data(path: str, target: str | None = None, echo_notes: bool = True, keep_columns=(),
              strict: bool | None = None):
    """Read a data table for a command.

    What reading guessed or did (delimiter, decimal commas, short rows,
    dropped or converted columns) goes to stderr as ``note:`` lines; a
    missing ``target`` or a ``--keep-column`` name the table lacks stops the
    command with the closest column name suggested. With a target, what
    profiles and learners will do to the table
    (:func:`warmstart.data.clean.clean_table`: identifier columns left out
    or dates converted, with how to keep them; rows without a target left
    out; labels merged; infinite values read as missing; columns a model
    learns nothing from) gets a note too. The table is returned as read:
    the task's fingerprint is computed on it.

    With ``strict`` (default: the command's ``--strict``, see
    :data:`strict_option`) any such note stops the command instead, with one
    message naming the file and everything found, before anything is
    written.
    """
    from warmstart.data.clean import clean_table
    from warmstart.data.read import TableError, column_not_found, read_table

    if strict is None:
        ctx = click.get_current_context(silent=True)
        strict = bool(ctx is not None and ctx.meta.get(_STRICT))
    frame = read_table(path)
    notes = list(frame.attrs.get("notes", []))
    if echo_notes and not strict:  # before a missing column stops the command: a guessed delimiter explains it
        for note in notes:
            click.echo(f"note: {path}: {note}", err=True)
    shown = 0 if strict else len(notes)
    if target is not None and target not in frame.columns:
        fail(f"{path}: {column_not_found(target, frame.columns)}")
    for name in keep_columns:
        if name not in frame.columns:
            fail(f"{path}: {column_not_found(name, frame.columns, what='--keep-column')}")
    if target is not None and (echo_notes or strict):
        try:
            cleaned = clean_table(frame, target, keep_columns=keep_columns)
        except TableError as exc:
            fail(f"{path}: {exc}")
        for name, done in cleaned.column_notes.items():
            verb = "use it" if done.startswith("left out") else "use it as written"
            notes.append(f"column {name!r} {done}; pass --keep-column {shlex.quote(name)} to {verb}")
        notes.extend(cleaned.notes)
    if strict and notes:
        found = "".join(f"\n  - {note}" for note in notes)
        fail(f"{path}: refused (--strict); reading it found:{found}\n"
             "correct the file, or run without --strict to accept these as notes")
    if echo_notes:
        for note in notes[shown:]:
            click.echo(f"note: {path}: {note}", err=True)
    return frame


class _Stop:
    """Which signal stopped a run (None: none did)."""

    signal: int | None = None


@contextlib.contextmanager
def terminate_as_interrupt():
    """Within the block, SIGTERM stops the work as Ctrl-C does (a ``KeyboardInterrupt``),
    so a run stopped by a scheduler or ``kill`` keeps what it finished and prints its
    summary; the yielded object's ``signal`` says which signal came. The previous
    handlers come back on exit. Outside the main thread it does nothing."""
    stop = _Stop()
    if threading.current_thread() is not threading.main_thread():
        yield stop
        return

    def on_term(signum, frame):
        stop.signal = signum
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, on_term)
    try:
        yield stop
    finally:
        signal.signal(signal.SIGTERM, previous)
