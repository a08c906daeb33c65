"""Taking turns on one archive file without a service.

DuckDB lets one process write a file, and no other process open it at all
meanwhile (not even to read). So that a long ``tune`` does not shut everyone
out while it trains, it holds the file only while it writes
(:class:`ArchiveTurns`: open, write, close around each result), and every
command waits its turn for a while (:func:`open_archive`) before it refuses,
naming the file and the way to share one archive among many processes: one
``warmstart serve`` that owns it.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any, Callable

from warmstart.archive.store import Archive
from warmstart.errors import ArchiveLockedError

__all__ = ["open_archive", "ArchiveTurns", "DEFAULT_WAIT_SECONDS", "busy_message"]

DEFAULT_WAIT_SECONDS = 5.0  # how long a command waits for a busy archive (common practice: a few seconds)
_FIRST_PAUSE, _LONGEST_PAUSE = 0.02, 0.5  # seconds between tries, doubling from the first to the longest


def busy_message(path: str | Path, waited: float, why: str) -> str:
    """What a command says when the archive stayed busy for all of its wait."""
    return (f"{path}: another process is writing to this archive ({why}); it was still busy after the "
            f"{waited:g} s this command waited. DuckDB allows one writing process at a time: wait for it to "
            "finish and run the command again, wait longer with --wait SECONDS, or let one `warmstart serve` "
            "own the archive and give the other processes --server URL (a service shares one archive among "
            "many processes); nothing was changed.")


def open_archive(path: str | Path, read_only: bool = False, wait: float = DEFAULT_WAIT_SECONDS,
                 on_wait: Callable[[float], None] | None = None) -> Archive:
    """Open an archive, waiting up to ``wait`` seconds while another process holds it.

    Parameters
    ----------
    path : str or Path
        The archive file (``":memory:"`` opens at once).
    read_only : bool, default False
        Open for reading only.
    wait : float, default 5
        Seconds to keep trying while the file is locked; 0 tries once;
        ``math.inf`` waits until it is free.
    on_wait : callable, optional
        Called once with ``wait`` when the wait has lasted that long and
        goes on (only with ``wait=inf`` after the first ``notice`` seconds:
        see :class:`ArchiveTurns`).

    Raises
    ------
    ArchiveLockedError
        The file stayed locked for ``wait`` seconds: the message names it,
        says it is busy and that ``warmstart serve`` shares one archive.
    """
    if wait < 0 or wait != wait:
        raise ValueError(f"wait must be a number of seconds >= 0, got {wait!r}")
    start = time.monotonic()
    pause = _FIRST_PAUSE
    while True:
        try:
            return Archive(path, read_only=read_only)
        except ArchiveLockedError as exc:
            waited = time.monotonic() - start
            if waited >= wait:
                text, marker = str(exc), "this archive ("
                why = text.split(marker, 1)[1].split(")", 1)[0] if marker in text else "the file is locked"
                raise ArchiveLockedError(busy_message(path, wait, why)) from None
            if on_wait is not None:
                on_wait(waited)
            time.sleep(min(pause, max(wait - waited, 0.0)))
            pause = min(2 * pause, _LONGEST_PAUSE)


class ArchiveTurns:
    """An archive opened for each call and closed right after it.

    Any :class:`~warmstart.archive.store.Archive` method can be called on
    it; the file is held only during the call (read-only for the methods in
    :attr:`READS`). A long run that writes now and then (``tune``) lets other
    processes read and write between its writes. A call waits for the file
    as long as it takes (a result is never dropped because the file was
    busy); ``on_busy`` hears once per call when the wait passes ``notice``
    seconds.

    Parameters
    ----------
    path : str or Path
        The archive file.
    notice : float, default 5
        Seconds of waiting after which ``on_busy(path)`` is called.
    on_busy : callable, optional
        Told that a call is waiting for the file (e.g. to print a note).
    """

    READS = frozenset({"study", "studies", "trials", "trial_table", "tasks", "profiles", "profile_of", "space",
                       "neighbors", "defaults", "build_prior"})

    def __init__(self, path: str | Path, notice: float = DEFAULT_WAIT_SECONDS,
                 on_busy: Callable[[str], None] | None = None):
        self.path = str(path)
        self.notice = float(notice)
        self.on_busy = on_busy

    def __repr__(self) -> str:
        return f"ArchiveTurns({self.path!r})"

    def __getattr__(self, name: str) -> Any:
        if name.startswith("_") or not callable(getattr(Archive, name, None)):
            raise AttributeError(f"{type(self).__name__} passes on Archive methods only, not {name!r}")

        def call(*args, **kwargs):
            told = False

            def waiting(seconds: float) -> None:
                nonlocal told
                if not told and seconds >= self.notice and self.on_busy is not None:
                    told = True
                    self.on_busy(self.path)

            with open_archive(self.path, read_only=name in self.READS, wait=float("inf"), on_wait=waiting) as archive:
                return getattr(archive, name)(*args, **kwargs)

        call.__name__ = name
        return call
