"""The DuckDB archive of tuning history (store, ingest, queries, curation)."""

from warmstart.archive.store import DEFAULT_ARCHIVE, SCHEMA_VERSION, Archive, default_archive_path, fingerprint

__all__ = ["Archive", "DEFAULT_ARCHIVE", "SCHEMA_VERSION", "default_archive_path", "fingerprint"]
