"""Error types of warmstart.

Every error a user can cause is a :class:`WarmstartError`. Its message names
the culprit (file, row, column, parameter, value) and says what would be
valid, so the command line can print it as it is, without a traceback.
"""

from __future__ import annotations

__all__ = [
    "WarmstartError",
    "SpaceError",
    "ArchiveError",
    "ArchiveLockedError",
    "ArchiveDamagedError",
    "IngestError",
    "ObjectiveError",
    "ProfileError",
]


class WarmstartError(Exception):
    """Base class of every error warmstart raises on bad input."""


class SpaceError(WarmstartError, ValueError):
    """A search space or a config is not valid."""


class ArchiveError(WarmstartError):
    """The archive cannot be opened, read or written as asked."""


class ArchiveLockedError(ArchiveError):
    """Another process holds the archive for writing."""


class ArchiveDamagedError(ArchiveError):
    """The archive file is damaged: cut short, or a block fails its checksum.

    The message names the file and says what to do (``warmstart curate
    salvage`` copies what can still be read into a new archive).

    Attributes
    ----------
    unreadable : tuple
        What could not be read, when it is known: ``(table, column, detail)``
        triples (from ``warmstart curate check``, which reads every block).
    """

    def __init__(self, message: str, unreadable: tuple = ()):
        super().__init__(message)
        self.unreadable = tuple(unreadable)


class ObjectiveError(WarmstartError, ValueError):
    """An objective cannot be set up as asked (unknown command, bad metric ...)."""


class IngestError(WarmstartError, ValueError):
    """A file of past trials cannot be ingested."""


class ProfileError(WarmstartError, ValueError):
    """A dataset cannot be profiled (no target, one class, empty ...)."""
