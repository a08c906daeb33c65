"""The service's one writer: group commit, results before proposals, and a
failing write that takes nothing else down.

Real DuckDB files in tmp_path. The writer thread is held on a first write
(an event) so that the writes after it queue up and form one batch; which
transaction a write ran in comes from DuckDB's own ``txid_current()``.
"""

from __future__ import annotations

import threading

import pytest

from warmstart.archive.store import Archive
from warmstart.service.errors import Refused, ServiceError
from warmstart.service.writer import Later, RequestKey, Writer


def _note(name: str, log: list):
    def write(archive):
        archive.con.execute("INSERT INTO requests VALUES ('test', ?, 'r', 'd', 200, '{}', now()::TIMESTAMP)", [name])
        log.append(name)
        return 200, {"name": name, "txid": int(archive.con.execute("SELECT txid_current()").fetchall()[0][0])}
    return write


def _failing(log: list):
    def write(archive):
        archive.con.execute("INSERT INTO requests VALUES ('test', 'half', 'r', 'd', 200, '{}', now()::TIMESTAMP)")
        log.append("failing")
        raise ServiceError(409, "refused on purpose", "trial", 7)
    return write


def _names(archive: Archive) -> list[str]:
    return sorted(r[0] for r in archive.con.execute("SELECT request_id FROM requests").fetchall())


def _hold(writer: Writer):
    """Submit a first write that holds the writer's thread until the returned event is set,
    so that the writes after it queue up into one batch; (release, its future)."""
    release, entered = threading.Event(), threading.Event()

    def hold(archive):
        entered.set()
        assert release.wait(30)
        return 200, {}

    first = writer.submit(hold)
    assert entered.wait(30)
    return release, first


@pytest.fixture
def held(tmp_path):
    """A started writer whose thread waits in a first write until ``release`` is set."""
    archive = Archive(tmp_path / "w.duckdb")
    commits, drops = [], []
    writer = Writer(archive, on_commit=lambda: commits.append(1), on_failure=lambda: drops.append(1))
    writer.start()
    release, first = _hold(writer)
    yield writer, archive, release, first, commits, drops
    release.set()
    writer.close()
    archive.close()


def test_queued_writes_commit_together_results_first(held):
    writer, archive, release, first, commits, drops = held
    log: list = []
    futures = [writer.submit(_note(f"p{i}", log)) for i in range(3)]
    futures += [writer.submit(_note(f"r{i}", log), early=True) for i in range(2)]
    release.set()
    answers = [f.result(30) for f in futures]
    first.result(30)
    assert log == ["r0", "r1", "p0", "p1", "p2"]  # results first, each group in arrival order
    assert len({a.body["txid"] for a in answers}) == 1  # one transaction for the whole batch
    assert len(commits) == 2 and not drops  # the held write, then the batch: one commit each
    assert _names(archive) == ["p0", "p1", "p2", "r0", "r1"]


def test_a_failing_write_fails_alone_and_leaves_nothing_half_written(held):
    writer, archive, release, first, commits, drops = held
    log: list = []
    before = writer.submit(_note("a", log))
    bad = writer.submit(_failing(log))
    after = writer.submit(_note("b", log))
    release.set()
    assert before.result(30).body["name"] == "a" and after.result(30).body["name"] == "b"
    with pytest.raises(ServiceError, match="refused on purpose"):
        bad.result(30)
    # the batch ran, failed and rolled back; then each write again on its own
    assert log == ["a", "failing", "a", "failing", "b"]
    assert _names(archive) == ["a", "b"]  # the failing write's row is in no transaction that committed
    assert len(drops) == 2  # caches dropped after the batch's rollback and after the lone failure


def test_a_retry_in_the_same_batch_gets_the_first_answer(held):
    writer, archive, release, first, commits, drops = held
    log: list = []
    key = RequestKey("dana", "req-1", "POST /x", "00")
    one = writer.submit(_note("once", log), key)
    two = writer.submit(_note("twice", log), key)
    release.set()
    a, b = one.result(30), two.result(30)
    assert not a.replayed and b.replayed and b.body == a.body
    assert log == ["once"] and _names(archive) == ["once", "req-1"]  # its row, and the stored answer


def test_a_request_id_reused_for_another_request_fails_alone_in_its_batch(held):
    writer, archive, release, first, commits, drops = held
    log: list = []
    one = writer.submit(_note("first", log), RequestKey("dana", "req-2", "POST /x", "00"))
    other = writer.submit(_note("other", log), RequestKey("dana", "req-2", "POST /y", "11"))
    fine = writer.submit(_note("fine", log))
    release.set()
    assert one.result(30).body["name"] == "first" and fine.result(30).body["name"] == "fine"
    with pytest.raises(ServiceError, match=r"request id 'req-2' was used before for another request \(POST /x\)"):
        other.result(30)
    assert log == ["first", "fine"] and not drops  # nothing rolled back: the reuse wrote nothing
    assert _names(archive) == ["fine", "first", "req-2"]


def test_a_write_refused_before_it_changed_anything_undoes_nothing(held):
    writer, archive, release, first, commits, drops = held
    log: list = []

    def refuse(archive):
        archive.con.execute("SELECT count(*) FROM requests").fetchall()  # reads only
        log.append("refused")
        raise Refused(404, "no trial with id 99; trial ids come from propose", "trial", 99)

    a = writer.submit(_note("a", log))
    bad = writer.submit(refuse)
    b = writer.submit(_note("b", log))
    release.set()
    with pytest.raises(Refused, match="no trial with id 99"):
        bad.result(30)
    assert a.result(30).body["txid"] == b.result(30).body["txid"]  # still one transaction
    assert log == ["a", "refused", "b"] and not drops  # nothing run twice, no cache dropped
    assert _names(archive) == ["a", "b"]


def test_answers_to_an_event_loop_come_back_in_one_call_per_batch(held):
    """``submit_async``: a batch's answers reach their loop in one
    ``call_soon_threadsafe`` (one wake-up), a refusal is raised to its own
    caller only, and a caller that gave up is skipped without harm."""
    import asyncio

    writer, archive, release, first, commits, drops = held
    log: list = []
    calls = []

    async def main():
        loop = asyncio.get_running_loop()
        original = loop.call_soon_threadsafe

        def counted(callback, *args, **kwargs):
            calls.append(callback.__name__)
            return original(callback, *args, **kwargs)

        loop.call_soon_threadsafe = counted
        replies = [writer.submit_async(_note(f"a{i}", log)) for i in range(4)]
        refused = writer.submit_async(_refused)
        gone = writer.submit_async(_note("gone", log))
        gone.cancel()  # its client went away before the writer got to it
        await asyncio.sleep(0)
        release.set()
        answers = await asyncio.gather(*replies)
        with pytest.raises(Refused, match="no such trial"):
            await refused
        return answers

    answers = asyncio.run(main())
    first.result(30)
    assert [a.body["name"] for a in answers] == ["a0", "a1", "a2", "a3"]
    assert len({a.body["txid"] for a in answers}) == 1
    assert calls.count("_deliver") == 1  # one batch, one hand-back
    assert "gone" not in log and _names(archive) == ["a0", "a1", "a2", "a3"]


def _refused(archive):
    raise Refused(404, "no such trial", "trial", 9)


def test_later_bodies_are_filled_before_the_commit_and_retries_in_the_batch_get_them(tmp_path):
    archive = Archive(tmp_path / "w.duckdb")
    waiting: list[Later] = []
    order: list[str] = []

    def before_commit(archive):  # as the lease book draws a batch's proposals
        order.append("before_commit")
        for n, later in enumerate(waiting):
            later.fill({"drawn": n})
        waiting.clear()

    writer = Writer(archive, before_commit=before_commit)
    writer.start()

    def later(archive):
        order.append("write")
        waiting.append(Later())
        return 200, waiting[-1]

    release, first = _hold(writer)
    key = RequestKey("dana", "req-9", "POST /propose", "00")
    one, two, same = writer.submit(later, key), writer.submit(later), writer.submit(later, key)
    release.set()
    try:
        first.result(30)
        a, b, c = one.result(30), two.result(30), same.result(30)
        assert (a.body, b.body) == ({"drawn": 0}, {"drawn": 1})
        assert c.replayed and c.body == a.body  # the retry in the same batch: the first answer, once filled
        assert order == ["before_commit", "write", "write", "before_commit"]  # the held write, then the batch
        stored = archive.con.execute("SELECT response FROM requests WHERE request_id = 'req-9'").fetchall()
        assert stored == [('{"drawn": 0}',)]
        unfilled = writer.submit(lambda archive: (200, Later()))
        with pytest.raises(RuntimeError, match="was not filled in before its batch committed"):
            unfilled.result(30)
    finally:
        writer.close()
        archive.close()


def test_a_retry_in_a_later_batch_or_after_a_restart_gets_the_stored_answer(tmp_path):
    """The writer looks up only request ids it may have stored (SeenRequests): an id
    committed in an earlier batch, or before the writer started, is still found."""
    path = tmp_path / "w.duckdb"
    log: list = []
    key = RequestKey("dana", "req-9", "POST /x", "00")
    with Archive(path) as archive:
        writer = Writer(archive)
        writer.start()
        try:
            first = writer.submit(_note("once", log), key).result(30)
            again = writer.submit(_note("again", log), key).result(30)  # a batch of its own
            failed = writer.submit(_failing(log), RequestKey("dana", "req-10", "POST /x", "00"))
            with pytest.raises(ServiceError):
                failed.result(30)
            after_failure = writer.submit(_note("new", log), RequestKey("dana", "req-10", "POST /x", "00")).result(30)
        finally:
            writer.close()
    assert again.replayed and again.body == first.body and not after_failure.replayed
    with Archive(path) as archive:
        writer = Writer(archive)
        writer.start()
        try:
            restarted = writer.submit(_note("restart", log), key).result(30)
        finally:
            writer.close()
        names = _names(archive)
    assert restarted.replayed and restarted.body == first.body
    assert log == ["once", "failing", "new"] and names == ["new", "once", "req-10", "req-9"]
