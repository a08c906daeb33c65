"""The lease book under the writer's group commit: proposals and results of
one batch keep their rows in memory and write them with one statement per
table before the commit (``warmstart.service.rowbuffer``).

Real DuckDB files in tmp_path, the service's own writer and lease book (no
HTTP). The writer is held on a first write (an event) so that the writes
after it form one batch. What must hold, whatever the batching: every answer
names a row that is in the archive after the commit, trial numbers run
1, 2, 3 ... in each study, trial ids are never handed out twice, leases
pending at once are distinct, and a study's search kept in memory proposes
exactly what a search resumed from the archive proposes (the proposals of
the warm search are a function of its seed and history). Data and scores
are invented (the Branin test function, Dixon and Szegoe 1978).
"""

from __future__ import annotations

import json
import threading

import pytest

from service_support import SPACE, add_served_study, branin, new_task, seed_archive
from warmstart.archive.store import Archive
from warmstart.service.core import Service
from warmstart.service.errors import ServiceError
from warmstart.service.searches import start_search
from warmstart.space import Space


def _new_study(service: Service, seed: int, cold: bool = False) -> int:
    space = Space.from_dict(SPACE)
    task = new_task(seed=seed, name=f"store {seed}")
    search, origin, record, _ = service.query(
        lambda view: start_search(view, task["profile"], [], "bran", space, False, cold=cold))
    return add_served_study(service, task, space, search, origin, record)


def _propose(service: Service, study: int, k: int = 1):
    return service.writer.submit(lambda a: (200, service.leases.propose(a, study, k, None, "dana")))


def _record(service: Service, study: int, lease: dict):
    score = branin(lease["config"]["x1"], lease["config"]["x2"])
    return service.writer.submit(
        lambda a: (200, service.leases.record(a, study, lease["trial"], None, score, "ok", None, None, "dana")),
        early=True)


class _Held:
    """Holds the writer thread in a write until released, so the next writes queue up."""

    def __init__(self, service: Service):
        self.release, entered = threading.Event(), threading.Event()

        def hold(archive):
            entered.set()
            assert self.release.wait(60)
            return 200, {}

        self.first = service.writer.submit(hold)
        assert entered.wait(60)

    def go(self) -> None:
        self.release.set()
        self.first.result(60)


@pytest.fixture
def service(tmp_path):
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    service = Service(Archive(path))
    service.start()
    yield service
    service.close()


def _archive_agrees(service: Service, study: int, answers: list[dict]) -> None:
    con = service.reader().con
    trials = con.execute("SELECT number, score FROM trials WHERE study_id = ? ORDER BY number", [study]).fetchall()
    assert [t[0] for t in trials] == list(range(1, len(trials) + 1))
    by_number = dict(trials)
    for a in answers:
        assert by_number[a["number"]] == a["score"]
    states = dict(con.execute("SELECT trial_id, state FROM leases WHERE study_id = ?", [study]).fetchall())
    assert all(states[a["trial"]] == "recorded" for a in answers)


def test_one_batch_of_results_and_proposals_commits_every_row(service):
    study = _new_study(service, seed=10)
    held = [lease for lease in _propose(service, study, 8).result(60).body["leases"]]
    gate = _Held(service)
    records = [_record(service, study, lease) for lease in held[:6]]
    proposals = [_propose(service, study) for _ in range(6)]
    gate.go()
    answers = [f.result(60).body for f in records]
    fresh = [lease for f in proposals for lease in f.result(60).body["leases"]]
    assert sorted(a["number"] for a in answers) == [1, 2, 3, 4, 5, 6]
    _archive_agrees(service, study, answers)
    ids = [lease["trial"] for lease in held + fresh]
    assert len(set(ids)) == len(ids)  # no trial id handed out twice
    pending = held[6:] + fresh
    keys = {json.dumps(lease["config"], sort_keys=True) for lease in pending}
    assert len(keys) == len(pending)  # leases pending at once are distinct
    rows = service.reader().con.execute(
        "SELECT trial_id FROM leases WHERE study_id = ? AND state = 'pending' ORDER BY trial_id", [study]).fetchall()
    assert [r[0] for r in rows] == sorted(lease["trial"] for lease in pending)


def test_a_failing_write_in_the_batch_leaves_every_answer_in_the_archive(service):
    studies = [_new_study(service, seed=10), _new_study(service, seed=11, cold=True)]
    held = {s: _propose(service, s, 4).result(60).body["leases"] for s in studies}

    def fails(archive):
        archive.con.execute("INSERT INTO requests VALUES ('t', 'half', 'r', 'd', 200, '{}', now()::TIMESTAMP)")
        raise ServiceError(409, "refused on purpose", "trial", 7)

    gate = _Held(service)
    records = [_record(service, s, lease) for s in studies for lease in held[s][:3]]
    bad = service.writer.submit(fails)
    proposals = [_propose(service, s, 2) for s in studies]
    gate.go()
    answers = [f.result(60).body for f in records]
    with pytest.raises(ServiceError, match="refused on purpose"):
        bad.result(60)
    fresh = [f.result(60).body for f in proposals]
    for s in studies:
        _archive_agrees(service, s, [a for a in answers if a["study_id"] == s])
        assert sorted(a["number"] for a in answers if a["study_id"] == s) == [1, 2, 3]
    assert service.reader().con.execute("SELECT count(*) FROM requests WHERE request_id = 'half'").fetchall() == [(0,)]
    ids = [lease["trial"] for s in studies for lease in held[s]] + [x["trial"] for b in fresh for x in b["leases"]]
    assert len(set(ids)) == len(ids)


def test_the_search_kept_in_memory_proposes_what_a_resumed_one_proposes(tmp_path):
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    service = Service(Archive(path))
    service.start()
    try:
        study = _new_study(service, seed=12)
        held = _propose(service, study, 6).result(60).body["leases"]
        for round_ in range(3):  # batches of results and proposals, as under load
            gate = _Held(service)
            records = [_record(service, study, lease) for lease in held[:3]]
            proposals = [_propose(service, study) for _ in range(3)]
            gate.go()
            for f in records:
                f.result(60)
            held = held[3:] + [x for f in proposals for x in f.result(60).body["leases"]]
        live = _propose(service, study, 2).result(60).body["leases"]
        service.writer.submit(lambda a: (200, service.leases.forget())).result(60)  # rebuilt from the archive
        # release the two just proposed so both searches hold the same pending leases
        rows = service.reader().con.execute(
            "SELECT trial_id FROM leases WHERE study_id = ? AND state = 'pending'", [study]).fetchall()
        assert len(rows) == len(held) + 2
    finally:
        service.close()
    with Archive(path) as archive:  # the two leases of `live` go back to the pool: as if never proposed
        archive.con.execute("DELETE FROM leases WHERE trial_id IN (SELECT unnest(?::BIGINT[]))",
                            [[x["trial"] for x in live]])
    again = Service(Archive(path))
    again.start()
    try:
        resumed = _propose(again, study, 2).result(60).body["leases"]
    finally:
        again.close()
    assert [x["config"] for x in resumed] == [x["config"] for x in live]


def test_blas_runs_on_one_thread_while_the_service_runs(tmp_path):
    # reference: threadpoolctl's own report of the BLAS libraries loaded (numpy's OpenBLAS here)
    from threadpoolctl import threadpool_info

    def blas_threads():
        return [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]

    before = blas_threads()
    service = Service(Archive(tmp_path / "a.duckdb"))
    service.start()
    try:
        assert blas_threads() and set(blas_threads()) == {1}
    finally:
        service.close()
    assert blas_threads() == before  # given back as it was
