"""The DuckDB archive of tuning history (store, ingest, queries, curation).

Names are imported on first use, so ``warmstart.archive.location`` (the
default path) can be read without loading DuckDB or pandas.
"""

from __future__ import annotations

import importlib
from typing import Any

_WHERE = {
    "Archive": "warmstart.archive.store",
    "SCHEMA_VERSION": "warmstart.archive.store",
    "fingerprint": "warmstart.archive.store",
    "DEFAULT_ARCHIVE": "warmstart.archive.location",
    "default_archive_path": "warmstart.archive.location",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'warmstart.archive' has no attribute {name!r}")
    return getattr(importlib.import_module(module), name)
