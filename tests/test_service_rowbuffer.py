"""The rows a batch of the service's writer leaves: one row and many rows are
stored alike (``warmstart.service.rowbuffer``).

A lone write (one client alone) inserts its one row with ``VALUES`` and
updates its one lease with a filter; a batch of several uses ``unnest`` of a
list per column and a join. Property-based (hypothesis): rows of any values
the tables take read back as given (a round trip through DuckDB), through
either statement, and a recorded lease ends the same through either update.
A real DuckDB archive file (the service's schema), no mocks.
"""

from __future__ import annotations

import tempfile
from datetime import datetime
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from warmstart.archive.store import Archive
from warmstart.service.rowbuffer import RowBuffer, insert_rows

_MOMENTS = st.datetimes(min_value=datetime(2000, 1, 1), max_value=datetime(2100, 1, 1))
_TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), max_size=30)
_SCORES = st.none() | st.floats(allow_nan=False, allow_infinity=False)


@st.composite
def lease_rows(draw):
    ids = draw(st.lists(st.integers(1, 2**62), min_size=1, max_size=6, unique=True))
    return [(i, draw(st.integers(1, 9)), draw(_TEXT), draw(st.none() | _TEXT), draw(_MOMENTS), draw(_MOMENTS),
             draw(st.sampled_from(["pending", "recorded", "expired"])), draw(st.none() | st.integers(1, 2**31 - 1)),
             draw(st.sampled_from([None, "ok", "failed"])), draw(_SCORES), draw(st.none() | _MOMENTS))
            for i in ids]


def _archive() -> Archive:
    return Archive(Path(tempfile.mkdtemp(prefix="rowbuffer-")) / "a.duckdb")


ARCHIVE = None
COLUMNS: tuple[str, ...] = ()  # the leases table's columns and types, from the archive's own catalog
TYPES: tuple[str, ...] = ()


def _shared() -> Archive:
    global ARCHIVE, COLUMNS, TYPES
    if ARCHIVE is None:
        ARCHIVE = _archive()
        rows = ARCHIVE.con.execute("SELECT column_name, data_type FROM duckdb_columns() WHERE table_name = 'leases' "
                                   "ORDER BY column_index").fetchall()
        COLUMNS, TYPES = tuple(r[0] for r in rows), tuple(r[1] for r in rows)
    return ARCHIVE


def _leases(archive: Archive) -> list[tuple]:
    return archive.con.execute(f"SELECT {', '.join(COLUMNS)} FROM leases ORDER BY trial_id").fetchall()


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rows=lease_rows())
def test_one_row_and_many_rows_read_back_as_given(rows):
    archive = _shared()
    expected = sorted(rows)
    with archive.transaction() as con:
        con.execute("DELETE FROM leases")
        for row in rows:  # each alone: VALUES
            insert_rows(con, "leases", COLUMNS, TYPES, [row])
        alone = _leases(archive)
        con.execute("DELETE FROM leases")
        insert_rows(con, "leases", COLUMNS, TYPES, rows)  # together: unnest (one row: VALUES)
        together = _leases(archive)
        con.execute("DELETE FROM leases")
    assert alone == expected
    assert together == expected


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rows=lease_rows(), number=st.integers(1, 2**31 - 1), status=st.sampled_from(["ok", "failed"]),
       score=_SCORES, moment=_MOMENTS)
def test_a_lease_recorded_alone_or_in_a_batch_ends_the_same(rows, number, status, score, moment):
    archive = _shared()
    trial = rows[0][0]
    absent = max(r[0] for r in rows) + 1  # a second entry makes the batch path run (it matches no row)
    ends = []
    for recorded in ([(trial, number, status, score, moment)],
                     [(trial, number, status, score, moment), (absent, 1, "ok", 0.0, moment)]):
        with archive.transaction() as con:
            con.execute("DELETE FROM leases")
            insert_rows(con, "leases", COLUMNS, TYPES, rows)
            buffer = RowBuffer()
            buffer.recorded.extend(recorded)
            buffer.flush(archive)
            ends.append(_leases(archive))
            con.execute("DELETE FROM leases")
    assert ends[0] == ends[1]
    changed = [r for r in ends[0] if r[0] == trial][0]
    assert changed[6:] == ("recorded", number, status, score, moment)
    assert [r for r in ends[0] if r[0] != trial] == sorted(r for r in rows if r[0] != trial)
