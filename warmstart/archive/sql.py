"""Running one statement on an archive's connection, for the modules of this package.

Statements come from the modules themselves (identifiers from their
allow-lists); every value goes through a ``?`` placeholder in ``params``.
"""

from __future__ import annotations

from typing import Any

import duckdb

__all__ = ["fetch", "rows_changed", "quoted", "table_columns"]


def fetch(con: duckdb.DuckDBPyConnection, sql: str, params: Any = None) -> list[tuple]:
    """All rows of one statement, as tuples."""
    return con.execute(sql, params or []).fetchall()


def rows_changed(con: duckdb.DuckDBPyConnection, sql: str, params: Any = None) -> int:
    """Run a DELETE or UPDATE and return how many rows it changed (DuckDB returns the count as a row)."""
    result = fetch(con, sql, params)
    return int(result[0][0]) if result else 0


def quoted(name: str) -> str:
    """A name read from a database's own catalog (a column, a catalog), as a quoted SQL identifier."""
    return '"' + name.replace('"', '""') + '"'


def table_columns(con: duckdb.DuckDBPyConnection, catalog: str, table: str) -> list[str]:
    """Columns of ``catalog.main.table`` in order (empty when there is no such table)."""
    return [r[0] for r in fetch(
        con, "SELECT column_name FROM information_schema.columns WHERE table_catalog = ? AND table_schema = 'main' "
        "AND table_name = ? ORDER BY ordinal_position", [catalog, table])]
