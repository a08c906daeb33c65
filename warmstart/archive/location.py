"""Where the archive lives by default (kept apart from the store so that
commands which only need the path import no database or data library)."""

from __future__ import annotations

import os

__all__ = ["DEFAULT_ARCHIVE", "default_archive_path"]

DEFAULT_ARCHIVE = "archive/warmstart.duckdb"


def default_archive_path() -> str:
    """``$WARMSTART_ARCHIVE`` when set, else ``./archive/warmstart.duckdb``."""
    return os.environ.get("WARMSTART_ARCHIVE") or DEFAULT_ARCHIVE
