"""The in-memory set of stored request ids (``warmstart.service.seen``).

What must hold: every (principal, request id) pair stored in the archive's
``requests`` table, or added after a commit, is reported as possibly held
(the writer then looks it up, so no retry is ever recorded twice); a pair
never stored is reported as not held, so it costs no query. Pairs are random
text (hypothesis), stored in a real DuckDB file in a temporary folder.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from warmstart.archive.store import Archive
from warmstart.service.seen import SeenRequests

_pairs = st.lists(st.tuples(st.text(max_size=8), st.text(min_size=1, max_size=40)), max_size=40, unique=True)


@settings(max_examples=30, deadline=None)
@given(stored=_pairs, added=_pairs, other=_pairs, merge_at=st.integers(1, 8))
def test_every_stored_or_added_pair_may_be_held_and_no_other(stored, added, other, merge_at):
    with tempfile.TemporaryDirectory() as folder, Archive(Path(folder) / "r.duckdb") as archive:
        for principal, request_id in stored:
            archive.con.execute("INSERT INTO requests VALUES (?, ?, 'r', 'd', 200, '{}', now()::TIMESTAMP)",
                                [principal, request_id])
        seen = SeenRequests.load(archive.con, merge_at=merge_at)
    assert len(seen) == len(stored)
    seen.add(added[: len(added) // 2])  # two commits: the second may merge into the sorted array
    seen.add(added[len(added) // 2:])
    known = set(stored) | set(added)
    assert all(seen.may_hold(p, i) for p, i in known)
    # a pair never stored is not held (Python's 64-bit hashes of distinct short texts do not collide
    # in practice: a collision would make this pair cost one query, never a missed retry)
    assert not any(seen.may_hold(p, i) for p, i in other if (p, i) not in known)
    assert len(seen) == len(known)
