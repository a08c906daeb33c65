"""Rows a batch of writes leaves behind, written with one statement per table.

A DuckDB statement costs about a millisecond however few rows it writes, and
the writer commits up to :data:`~warmstart.service.writer.MAX_BATCH` writes
together (:mod:`warmstart.service.writer`). The lease book
(:mod:`warmstart.service.leases`) therefore keeps the rows of the writes of
a batch here (new leases, leases recorded, trials) and the writer writes
them, inside the batch's transaction and before its commit, with one
statement per kind of row (trials: one per search space). A read of the same
tables inside the transaction flushes first, so it sees every row so far.

Trial ids (the ``trial_ids`` sequence) are taken from the archive in blocks
(:class:`TrialIds`), one statement per block; ids of a block that a crash or
a rolled-back batch leaves unused are never handed out (gaps, no repeats).
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from datetime import datetime

__all__ = ["RowBuffer", "TrialIds", "ID_BLOCK", "insert_rows"]

ID_BLOCK = 64  # trial ids taken from the sequence at a time

_LEASE_COLUMNS = ("trial_id", "study_id", "config", "owner", "created_at", "expires_at", "state", "number",
                  "status", "score", "recorded_at")
_LEASE_TYPES = ("BIGINT", "BIGINT", "VARCHAR", "VARCHAR", "TIMESTAMP", "TIMESTAMP", "VARCHAR", "INTEGER",
                "VARCHAR", "DOUBLE", "TIMESTAMP")


def insert_rows(con, table: str, columns: tuple[str, ...], types: tuple[str, ...], rows: list[tuple]) -> None:
    """Insert ``rows`` into ``table`` (names from this package's constants) with one
    statement: ``VALUES`` for one row, ``unnest`` of one list per column for more.

    A lone write (one client on an idle service: every write a batch of its own)
    has one row per table, and DuckDB binds scalars faster than lists (figures:
    ``examples/bench_write_floor.py``, ``docs/benchmarks.md``).
    """
    names = ", ".join(columns)
    if len(rows) == 1:
        con.execute(f"INSERT INTO {table} ({names}) VALUES ({', '.join(f'?::{t}' for t in types)})", list(rows[0]))
    else:
        given = ", ".join(f"unnest(?::{t}[])" for t in types)
        con.execute(f"INSERT INTO {table} ({names}) SELECT {given}", [list(col) for col in zip(*rows)])


@dataclass
class RowBuffer:
    """Rows waiting for the next :meth:`flush` (all inside one transaction)."""

    #: whole lease rows to insert, in the order of ``_LEASE_COLUMNS``
    leases: list[tuple] = field(default_factory=list)
    #: (trial id, number, status, score, recorded_at) of pending leases now recorded
    recorded: list[tuple[int, int, str, float | None, datetime]] = field(default_factory=list)
    #: (study, row checked by Archive.check_trial, its number)
    trials: list[tuple[int, dict, int]] = field(default_factory=list)

    def __bool__(self) -> bool:
        return bool(self.leases or self.recorded or self.trials)

    def add_lease(self, trial: int, study: int, config: str, owner: str | None, created: datetime,
                  expires: datetime, state: str = "pending", number: int | None = None, status: str | None = None,
                  score: float | None = None, recorded_at: datetime | None = None) -> None:
        self.leases.append((trial, study, config, owner, created, expires, state, number, status, score,
                            recorded_at))

    def add_trial(self, study: int, row: dict, number: int) -> None:
        self.trials.append((study, row, number))

    def clear(self) -> None:
        self.leases.clear()
        self.recorded.clear()
        self.trials.clear()

    def flush(self, archive) -> None:
        """Write every waiting row (trials, new leases, then recorded leases) and forget them."""
        if not self:
            return
        con = archive.con
        if self.trials:
            archive.insert_checked_trials(self.trials)
        if self.leases:
            insert_rows(con, "leases", _LEASE_COLUMNS, _LEASE_TYPES, self.leases)
        if len(self.recorded) == 1:  # a lone result: a filter, no join (1.2-1.6 ms against 2.4-3.1 ms)
            trial, number, status, score, moment = self.recorded[0]
            con.execute("UPDATE leases SET state = 'recorded', number = ?, status = ?, score = ?, recorded_at = ? "
                        "WHERE trial_id = ?", [number, status, score, moment, trial])
        elif self.recorded:
            ids, numbers, statuses, scores, moments = (list(col) for col in zip(*self.recorded))
            con.execute(
                "UPDATE leases SET state = 'recorded', number = u.n, status = u.st, score = u.sc, recorded_at = u.at "
                "FROM (SELECT unnest(?::BIGINT[]) AS t, unnest(?::INTEGER[]) AS n, unnest(?::VARCHAR[]) AS st, "
                "unnest(?::DOUBLE[]) AS sc, unnest(?::TIMESTAMP[]) AS at) u WHERE leases.trial_id = u.t",
                [ids, numbers, statuses, scores, moments])
        self.clear()


class TrialIds:
    """Trial ids from the archive's ``trial_ids`` sequence, a block at a time."""

    def __init__(self, block: int = ID_BLOCK):
        self.block = int(block)
        self._free: deque[int] = deque()

    def take(self, archive, n: int) -> list[int]:
        """``n`` fresh ids (one statement when the block runs out)."""
        if len(self._free) < n:
            rows = archive.con.execute("SELECT nextval('trial_ids') FROM range(?)",
                                       [max(self.block, n - len(self._free))]).fetchall()
            self._free.extend(sorted(int(r[0]) for r in rows))
        return [self._free.popleft() for _ in range(n)]

    def drop(self) -> None:
        """Forget the ids held (after a rolled-back batch, whose sequence step may be undone)."""
        self._free.clear()

