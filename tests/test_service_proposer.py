"""The studies' searches behind one interface: in the service process or in
a child process of their own (``warmstart.service.proposer`` and
``warmstart.service.search_process``).

What must hold: a search survives pickling (Python's ``pickle`` protocol,
the way the child is sent its searches) and then proposes exactly what the
original proposes; the same sequence of proposals, results, expiries,
rebuilds and failed batches, run through a service with its searches in
process and through one with them in a child process, leases exactly the
same configs with the same ids and answers the same counts and best scores;
a failed batch drops its studies' searches in the child too; when the child
is killed the request that hits it gets a 503 (never a 500), nothing of it
is written, and the next request works on a new child rebuilt from the
archive. Real DuckDB files in tmp_path; data and scores are invented (the
Branin test function, Dixon and Szegoe 1978).
"""

from __future__ import annotations

import contextlib
import json
import os
import pickle
import shutil
import signal
import time

import numpy as np
import pytest
from fastapi.testclient import TestClient
from hypothesis import given, settings
from hypothesis import strategies as st

from service_support import SPACE, add_served_study, branin, dump, new_task, seed_archive
from warmstart.archive.store import Archive
from warmstart.search.density import DensitySearch
from warmstart.search.mixture import MixtureSearch
from warmstart.service import create_app
from warmstart.service.core import Service
from warmstart.service.errors import ServiceError
from warmstart.service.proposer import HeldSearch, InProcessProposer, NoConfigLeft, SearchesLost
from warmstart.service.writer import Later
from warmstart.service.search_process import ChildProcessProposer, ShardedProposer
from warmstart.service.searches import start_search
from warmstart.space import Space

def _score(config: dict) -> float:
    return branin(config["x1"], config["x2"])


def _search(archive: Archive, kind: str):
    """A fresh study's search as the service starts it: warm mixture, warm seed list, or cold."""
    space = Space.from_dict(SPACE)
    task = new_task(seed=21, name="store 21")
    n_seeds = 4 if kind == "seeded" else None
    search, origin, record, _ = start_search(archive, task["profile"], [], "bran", space, False,
                                             cold=kind == "cold", n_seeds=n_seeds)
    return search, origin, record


# -- pickling ------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind, expected", [("warm", MixtureSearch), ("seeded", DensitySearch),
                                            ("cold", DensitySearch)])
def test_a_pickled_search_proposes_what_the_original_proposes(tmp_path, kind, expected):
    # reference: Python's pickle protocol (what multiprocessing sends); the copy must carry the
    # generator's state, the recorded trials and the pending configs
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    with Archive(path) as archive:
        search, _, _ = _search(archive, kind)
    assert type(search) is expected
    for _ in range(7):
        config = search.propose()
        search.record(config, _score(config))
    held = search.propose(3)  # pending at the time of the copy
    copy = pickle.loads(pickle.dumps(search))
    assert copy.trial_count == search.trial_count == 7 and copy.n_pending == search.n_pending == 3
    for step in range(12):
        a, b = search.propose(), copy.propose()
        assert a == b, f"step {step}"
        if step % 4 == 0:  # steps 0, 4, 8: the pending configs released one by one
            assert search.release(held[step // 4]) and copy.release(held[step // 4])
        search.record(a, _score(a))
        copy.record(b, _score(b))
    assert copy.best.score == search.best.score


@settings(max_examples=25, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["propose", "release", "record", "config"]), st.integers(1, 3),
                          st.integers(0, 10**6)), min_size=1, max_size=25))
def test_held_search_never_leases_a_pending_config_and_agrees_with_its_search(steps):
    # invariant: every config handed out differs from every config pending at that time, and the
    # pending set kept beside the search is exactly what the search holds pending (one copy each)
    space = Space.from_dict(SPACE)
    held = HeldSearch(DensitySearch(space, seed=3, maximize=False))
    for what, k, pick in steps:
        pending = sorted(held.pending)
        if what == "propose":
            try:
                leased = held.propose(k)
            except NoConfigLeft:  # may happen only once the search keeps repeating pending configs
                continue
            keys = [key for key, _ in leased]
            assert len(set(keys)) == k and not set(keys) & set(pending)
        elif what in ("release", "record") and pending:
            key = pending[pick % len(pending)]
            if what == "release":
                held.release([key])
            else:
                held.record(key, _score(json.loads(key)), "ok")
            assert key not in held.pending
        elif what == "config":
            config = space.sample(1, rng=pick)[0]
            held.record(space.canonical_json(config), _score(config), "ok")
        assert held.search.n_pending == len(held.pending)


def test_held_search_refuses_when_every_proposal_is_pending_already():
    # a space of one point: the second lease can only repeat the first
    space = Space.from_dict({"params": {"c": {"type": "choice", "choices": ["only"]}}})
    held = HeldSearch(DensitySearch(space, seed=0, maximize=False))
    assert [c for _, c in held.propose(1)] == [{"c": "only"}]
    with pytest.raises(NoConfigLeft, match=r"no config left that is not pending already \(1 leased\)"):
        held.propose(1)


# -- the same leases through both proposers ----------------------------------------------------------
def _new_study(service: Service, kind: str) -> int:
    search, origin, record = service.query(lambda view: _search(view, kind))
    space = Space.from_dict(SPACE)
    return add_served_study(service, new_task(seed=21, name="store 21"), space, search, origin, record)


def _call(service: Service, fn, early: bool = False):
    """Run ``fn(archive)`` in the writer; the answer's body, or the ServiceError it raised."""
    try:
        return service.writer.submit(lambda a: (200, fn(a)), early=early).result(120).body
    except ServiceError as exc:
        return ("refused", exc.status, exc.message)


def _failing(service: Service, study: int):
    def fn(archive):
        service.leases.propose(archive, study, 2, None, "dana")  # the search moves, then the write fails
        raise ServiceError(409, "refused on purpose", "k", 2)

    return _call(service, fn)


def _without_times(answer):
    if isinstance(answer, dict) and "leases" in answer:
        return {**answer, "leases": [{k: v for k, v in x.items() if k != "expires_at"} for x in answer["leases"]]}
    return answer


@pytest.mark.parametrize("kind", ["warm", "seeded", "cold"])
def test_both_proposers_lease_the_same_configs_for_one_sequence(tmp_path, kind):
    # reference: the in-process lease book (the service's behaviour before the child process)
    first, second = tmp_path / "in.duckdb", tmp_path / "child.duckdb"
    seed_archive(first)
    shutil.copy(first, second)
    services = [Service(Archive(first), search_process=False), Service(Archive(second), search_process=True)]
    assert [s.leases.searches.in_child for s in services] == [False, True]
    for s in services:
        s.start()
    try:
        studies = [_new_study(s, kind) for s in services]
        assert studies[0] == studies[1]
        study = studies[0]
        space = Space.from_dict(SPACE)
        rng = np.random.default_rng(5)
        open_leases: list[dict] = []  # leases of 1 h, recorded later
        expired: list[dict] = []  # leases of 0 s: expired at the next call
        seen = {"propose": 0, "record": 0, "late": 0, "config": 0, "forget": 0, "failed batch": 0}
        for step in range(70):
            r = rng.random()
            if r < 0.35 or not open_leases:
                k, seconds = int(rng.integers(1, 4)), (0.0 if rng.random() < 0.2 else None)
                what = "propose"
                answers = [_call(s, lambda a, s=s: s.leases.propose(a, study, k, seconds, "dana")) for s in services]
                (expired if seconds == 0.0 else open_leases).extend(answers[0]["leases"])
            elif r < 0.75:
                lease = open_leases.pop(int(rng.integers(len(open_leases))))
                failed = rng.random() < 0.1
                what = "record"
                answers = [_call(s, lambda a, s=s: s.leases.record(
                    a, study, lease["trial"], None, None if failed else _score(lease["config"]),
                    "failed" if failed else "ok", None, 1.0, "dana"), early=True) for s in services]
            elif r < 0.82 and expired:
                lease = expired.pop(0)  # a late result for an expired lease is still recorded
                what = "late"
                answers = [_call(s, lambda a, s=s: s.leases.record(
                    a, study, lease["trial"], None, _score(lease["config"]), "ok", None, None, "dana"), early=True)
                    for s in services]
            elif r < 0.88:
                config = space.sample(1, rng=int(rng.integers(2**31)))[0]
                what = "config"
                answers = [_call(s, lambda a, s=s: s.leases.record(
                    a, study, None, config, _score(config), "ok", None, None, "lee"), early=True) for s in services]
            elif r < 0.94:
                what = "forget"  # every search rebuilt from the archive, pending leases held again
                answers = [_call(s, lambda a, s=s: s.leases.forget()) for s in services]
            else:
                what = "failed batch"
                answers = [_failing(s, study) for s in services]
                assert answers[0] == ("refused", 409, "refused on purpose")
                assert [s.leases.searches.studies() for s in services] == [[], []]  # dropped in the child too
            seen[what] += 1
            assert _without_times(answers[0]) == _without_times(answers[1]), f"step {step}: {what}"
        assert all(seen.values()), seen  # every kind of step ran
        assert services[1].leases.searches.started == 1  # one child did it all
    finally:
        for s in services:
            s.close()
    kept = [_trials_and_leases(p, study) for p in (first, second)]
    assert kept[0] == kept[1] and len(kept[0][0]) == seen["record"] + seen["late"] + seen["config"]


def _trials_and_leases(path, study: int) -> tuple[list, list]:
    """The trials and leases of a study, times aside."""
    with Archive(path, read_only=True) as archive:
        trials = archive.con.execute(
            "SELECT number, config, score, status FROM trials WHERE study_id = ? ORDER BY number", [study]).fetchall()
        leases = archive.con.execute(
            "SELECT trial_id, config, state, number, status, score FROM leases WHERE study_id = ? ORDER BY trial_id",
            [study]).fetchall()
    return trials, leases


# -- faults of the child process -------------------------------------------------------------------
def _wait_gone(pid: int, timeout: float = 30.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with open(f"/proc/{pid}/stat") as f:
                if f.read().rsplit(")", 1)[1].split()[0] == "Z":
                    return True  # ended, not yet reaped by its new parent
        except FileNotFoundError:
            return True
        time.sleep(0.05)
    return False


def test_a_killed_search_process_costs_at_most_a_503_then_a_new_child_rebuilt_from_the_archive(tmp_path):
    # a result goes to the search process without waiting for it: its send may or may not see that the
    # child is gone (a 503, nothing written, or a 200 and the next exchange sees it); a proposal waits
    # for its answer, so the first one after the death always does. Never a 500, nothing half-written.
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    with TestClient(create_app(Archive(path), search_process=True), raise_server_exceptions=False) as c:
        r = c.post("/api/v1/studies", json={"task": new_task(), "learner": "bran", "space": SPACE,
                                            "metric": "loss", "maximize": False})
        assert r.status_code == 201, r.text
        study = r.json()["study_id"]
        leases = c.post(f"/api/v1/studies/{study}/propose", json={"k": 3}).json()["leases"]
        first = c.post(f"/api/v1/studies/{study}/trials",
                       json={"trial": leases[0]["trial"], "score": _score(leases[0]["config"])})
        assert first.status_code == 200
        service = c.app.state.service
        pid = service.leases.searches.pid
        os.kill(pid, signal.SIGKILL)
        assert _wait_gone(pid)
        statuses = []
        for _ in range(2):  # a 503 leaves nothing written; the retry records it
            before = dump(service.reader().con)
            second = c.post(f"/api/v1/studies/{study}/trials",
                            json={"trial": leases[1]["trial"], "score": _score(leases[1]["config"])})
            statuses.append(second.status_code)
            if second.status_code == 200:
                break
            assert second.status_code == 503 and second.json()["field"] == "searches", second.text
            assert "search process ended" in second.json()["error"]
            assert dump(service.reader().con) == before
        assert statuses in ([200], [503, 200])
        assert second.json()["number"] == 2 and second.json()["trial_count"] == 2
        proposed = [c.post(f"/api/v1/studies/{study}/propose", json={"k": 2}) for _ in range(2)]
        codes = [p.status_code for p in proposed]
        # the death is seen by exactly one request: the record (503) or else the first proposal
        assert codes == ([200, 200] if statuses == [503, 200] else [503, 200]), codes
        fresh = [x["config"] for p in proposed if p.status_code == 200 for x in p.json()["leases"]]
        pending = [leases[2]["config"]] + fresh
        assert len({tuple(sorted(p.items())) for p in pending}) == len(pending)  # the rebuilt search holds them
        assert service.leases.searches.pid not in (None, pid) and service.leases.searches.started == 2
        assert list(service.reader().trials(study)["number"]) == [1, 2]


def test_a_lost_search_process_during_a_proposal_writes_nothing(tmp_path):
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    service = Service(Archive(path), search_process=True)
    service.start()
    try:
        study = _new_study(service, "warm")
        pid = service.leases.searches.pid
        os.kill(pid, signal.SIGKILL)
        assert _wait_gone(pid)
        before = dump(service.reader().con)
        answer = _call(service, lambda a: service.leases.propose(a, study, 2, None, "dana"))
        assert answer[:2] == ("refused", 503)
        assert dump(service.reader().con) == before
        leases = _call(service, lambda a: service.leases.propose(a, study, 2, None, "dana"))["leases"]
        assert len(leases) == 2
    finally:
        service.close()
    assert _wait_gone(pid) and service.leases.searches.pid is None  # stopped and joined


def test_a_hung_search_process_is_replaced():
    proposer = ChildProcessProposer(reply_timeout=120.0)
    proposer.start()
    try:
        assert proposer.studies() == []  # started and answering
        proposer.reply_timeout = 0.5
        pid = proposer.pid
        os.kill(pid, signal.SIGSTOP)  # alive but silent
        with pytest.raises(SearchesLost, match=r"no answer.*rebuilt from the archive"):
            proposer.studies()
        assert _wait_gone(pid)
        proposer.reply_timeout = 120.0  # the new child's first answer waits for its imports
        assert proposer.studies() == [] and proposer.pid != pid and proposer.started == 2
    finally:
        proposer.close()


def test_the_in_process_proposer_answers_like_the_child_for_unknown_studies():
    for proposer in (InProcessProposer(), ChildProcessProposer()):
        proposer.start()
        try:
            with pytest.raises(SearchesLost, match="search of study 9 is not held"):
                proposer.propose(9, 1)
            proposer.forget(9)
            assert proposer.studies() == []
        finally:
            proposer.close()


# -- a real `warmstart serve` with its search process ------------------------------------------------
def _children(pid: int, marker: str = "spawn_main") -> list[int]:
    """Live processes whose parent is ``pid`` and whose command line holds ``marker``
    (multiprocessing's spawned children; its resource tracker has another), from /proc."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as f:
                state, ppid = f.read().rsplit(")", 1)[1].split()[:2]
        except (FileNotFoundError, ProcessLookupError, IndexError):
            continue
        if int(ppid) == pid and state != "Z":
            with contextlib.suppress(FileNotFoundError, ProcessLookupError):
                with open(f"/proc/{entry}/cmdline", "rb") as f:
                    if marker.encode() in f.read():
                        found.append(int(entry))
    return found


def _pairs(url: str, study: int, n: int) -> None:
    from warmstart.client import Client

    with Client(url) as client:
        for _ in range(n):
            lease = client.propose(study)[0]
            client.record(study, trial=lease["trial"], score=_score(lease["config"]))


@pytest.mark.skipif(not os.path.isdir("/proc"), reason="finds the child process in /proc")
def test_the_search_process_ends_with_a_killed_service_and_is_joined_by_a_stopped_one(tmp_path):
    from service_support import ServerProcess
    from warmstart.client import Client

    path = tmp_path / "team.duckdb"
    seed_archive(path)
    server = ServerProcess(path, options=("--search-process", "--search-processes", "1")).start()
    try:
        with Client(server.url) as client:
            study = client.new_study(new_task(), "bran", space=SPACE, metric="loss", maximize=False)["study_id"]
        _pairs(server.url, study, 3)
        children = _children(server.proc.pid)
        assert len(children) == 1  # the search process
        helpers = _children(server.proc.pid, marker="resource_tracker")  # multiprocessing's own, with spawn
        server.kill()  # kill -9: the child reads the end of its pipe and exits by itself
        assert all(_wait_gone(pid, timeout=30) for pid in children + helpers)
        assert "searches in a child process" in server.log.read_text()
        server = ServerProcess(path, port=server.port, options=("--search-process",)).start()
        _pairs(server.url, study, 3)  # the study rebuilt from the archive in a new child
        children = _children(server.proc.pid)
        assert len(children) == 2  # the studies spread over two by default
        assert server.stop(signal.SIGTERM) == 0
        assert all(_wait_gone(pid, timeout=5) for pid in children)  # stopped and joined before the service exits
        log = server.log.read_text()
        assert "searches in 2 child processes" in log and "stopped on SIGTERM" in log
        server = ServerProcess(path, port=server.port, options=("--no-search-process",)).start()
        _pairs(server.url, study, 2)
        assert _children(server.proc.pid, marker="") == []  # no process of any kind
        assert server.stop(signal.SIGINT) == 0
        assert "searches in this process" in server.log.read_text()
    finally:
        server.kill()
    with Archive(path, read_only=True) as archive:
        assert list(archive.trials(study)["number"]) == list(range(1, 9))


def test_serve_help_says_why_the_searches_get_a_process():
    from click.testing import CliRunner

    from warmstart.cli import main

    result = CliRunner().invoke(main, ["serve", "--help"])
    assert result.exit_code == 0
    text = " ".join(result.stdout.split())
    assert "--search-process / --no-search-process" in text
    assert "on a second core" in text and "2 or more cores" in text


def test_a_started_service_has_heard_from_its_search_process(tmp_path):
    # ready before the first request: the first proposal after a start used to wait for the
    # child's start (1.3 s on 2 cores) with every client behind it
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    service = Service(Archive(path), search_process=True)
    try:
        assert service.leases.searches.pid is None
        service.start()
        assert service.leases.searches.pid is not None and service.leases.searches._heard
    finally:
        service.close()


def test_the_search_process_loads_the_searches_but_not_the_web_stack():
    # what the child imports: its module pulls no web framework in (warmstart.service loads
    # create_app and Tokens when asked for), and its warm-up loads what a search runs on
    import subprocess
    import sys

    code = ("import sys; import warmstart.service.search_process as sp; web = sorted(m for m in ('fastapi', "
            "'starlette', 'uvicorn', 'warmstart.service.app') if m in sys.modules); sp._import_searches(); "
            "print(web, all(m in sys.modules for m in ('warmstart.search.mixture', 'warmstart.search.density', "
            "'scipy.stats.qmc')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[] True"
    import warmstart.service as package

    assert package.create_app is create_app and package.Tokens.__name__ == "Tokens"
    with pytest.raises(AttributeError, match="no attribute 'nothing'"):
        package.nothing  # noqa: B018


class _Together(Later):
    """The bodies of several proposals of one write, filled when its batch settles."""

    def __init__(self, parts):
        super().__init__()
        self.parts = parts

    def body(self):
        return [part.body() for part in self.parts]


def test_studies_spread_over_two_children_lease_what_one_process_leases(tmp_path):
    # reference: the in-process lease book; four studies in both children (by id), each batch proposing
    # for all of them at once, then recording every lease; then one child killed: a 503, nothing
    # written, and every study rebuilt from the archive proposes as the reference does
    first, second = tmp_path / "in.duckdb", tmp_path / "spread.duckdb"
    seed_archive(first)
    shutil.copy(first, second)
    services = [Service(Archive(first), search_process=False), Service(Archive(second), search_process=2)]
    assert isinstance(services[1].leases.searches, ShardedProposer)
    for s in services:
        s.start()
    try:
        studies = [[_new_study(s, kind) for kind in ("warm", "cold", "seeded", "warm")] for s in services]
        assert studies[0] == studies[1] and {study % 2 for study in studies[0]} == {0, 1}
        ids = studies[0]

        def round_of(s, k):
            batch = _call(s, lambda a: _Together([s.leases.propose(a, st, k, None, "dana") for st in ids]))
            _call(s, lambda a: [s.leases.record(a, st, lease["trial"], None, _score(lease["config"]), "ok", None,
                                                None, "dana") for st, b in zip(ids, batch) for lease in b["leases"]],
                  early=True)
            return [_without_times(b) for b in batch]

        for k in (1, 3, 2):
            assert round_of(services[0], k) == round_of(services[1], k)
        assert services[1].leases.searches.studies() == sorted(ids)
        assert len(set(services[1].leases.searches.pids)) == 2
        killed = services[1].leases.searches.pids[ids[1] % 2]
        os.kill(killed, signal.SIGKILL)
        assert _wait_gone(killed)
        before = dump(services[1].reader().con)
        assert _call(services[1], lambda a: _Together([services[1].leases.propose(a, st, 1, None, "dana")
                                                       for st in ids]))[:2] == ("refused", 503)
        assert dump(services[1].reader().con) == before
        _call(services[0], lambda a: services[0].leases.forget())  # the reference rebuilds its searches too
        for k in (2, 1):  # the same configs (the failed batch's block of trial ids is not used again)
            assert _configs(round_of(services[0], k)) == _configs(round_of(services[1], k))
        assert services[1].leases.searches.started == 3  # the killed child replaced, the other kept
    finally:
        for s in services:
            s.close()
    for study in ids:
        assert _trials_and_leases(first, study)[0] == _trials_and_leases(second, study)[0]


def _configs(bodies):
    return [[(b["study_id"], lease["config"]) for lease in b["leases"]] for b in bodies]


def test_a_spread_proposer_raises_the_error_of_the_first_item_that_failed():
    proposer = ShardedProposer(2)
    try:
        proposer.start()
        space = Space.from_dict({"params": {"c": {"type": "choice", "choices": ["only"]}}})
        for study in (1, 2):
            proposer.adopt(study, DensitySearch(space, seed=0, maximize=False))
        assert proposer.propose_many([(2, 1), (1, 1)]) == [[('{"c":"only"}', {"c": "only"})]] * 2
        with pytest.raises(NoConfigLeft) as error:  # both children fail: study 2 was asked first
            proposer.propose_many([(2, 1), (1, 1)])
        assert error.value.study == 2
        assert proposer.studies() == [1, 2]  # both children answered, so each may be asked again
    finally:
        proposer.close()
    with pytest.raises(ValueError, match="2 or more child processes"):
        ShardedProposer(1)
