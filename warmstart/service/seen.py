"""Which client request ids the archive may hold an answer for, kept in memory.

The writer must look up every request id a write carries (a retry gets its
stored answer). A lookup in the ``requests`` table costs a scan of it once
ids are random, as clients make them (DuckDB does not use the primary key's
index for these joins): 3.3 ms at 10,000 stored answers, 37 ms at 1,000,000
(``examples/bench_request_lookup.py``), paid by every batch, while almost
every id a batch carries is new. :class:`SeenRequests` keeps a 64-bit hash
of every stored (principal, request id), and of every id of a committed
batch: an id whose hash is not there was never stored and needs no query;
one whose hash is there (a retry, an id refused before, or a hash shared by
chance) is looked up in the table as before. So an answer is never missed:
the set only ever says "maybe" too often.

The hashes are Python's own hash of the pair (salted per process, which is
fine: the set is built again at every start), 8 bytes each in a sorted
array, plus a small set of the ones added since the last merge.
"""

from __future__ import annotations

import numpy as np

__all__ = ["SeenRequests"]

MERGE_AT = 65_536  # hashes added since the last merge before they join the sorted array
LOAD_CHUNK = 65_536  # rows read at a time when the set is built from the archive


class SeenRequests:
    """Hashes of the (principal, request id) pairs the ``requests`` table holds.

    Parameters
    ----------
    merge_at : int, default MERGE_AT
        Hashes added one by one that are merged into the sorted array at once.
    """

    def __init__(self, merge_at: int = MERGE_AT):
        self.merge_at = int(merge_at)
        self._base = np.empty(0, dtype=np.int64)
        self._recent: set[int] = set()

    @classmethod
    def load(cls, con, merge_at: int = MERGE_AT) -> "SeenRequests":
        """The set of every pair stored in the ``requests`` table of connection ``con``."""
        seen = cls(merge_at)
        cursor = con.execute("SELECT principal, request_id FROM requests")
        parts = []
        while rows := cursor.fetchmany(LOAD_CHUNK):
            parts.append(np.fromiter((hash(tuple(row)) for row in rows), dtype=np.int64, count=len(rows)))
        if parts:
            seen._base = np.unique(np.concatenate(parts))
        return seen

    def __len__(self) -> int:
        """Distinct hashes held (pairs stored, but for hashes shared by chance)."""
        return self._base.size + len(self._recent)

    def may_hold(self, principal: str, request_id: str) -> bool:
        """False when the pair was never stored; True when it may have been."""
        h = hash((principal, request_id))
        return h in self._recent or self._in_base(h)

    def _in_base(self, h: int) -> bool:
        i = int(np.searchsorted(self._base, h))
        return i < self._base.size and int(self._base[i]) == h

    def add(self, pairs) -> None:
        """Pairs of a committed batch (stored, or refused: a needless "maybe" at worst)."""
        for pair in pairs:
            h = hash(tuple(pair))
            if not self._in_base(h):
                self._recent.add(h)
        if len(self._recent) >= self.merge_at:
            merged = np.fromiter(self._recent, dtype=np.int64, count=len(self._recent))
            self._base = np.union1d(self._base, merged)
            self._recent = set()
