"""A real ``warmstart serve`` process on 127.0.0.1 (a free port): concurrent
clients, ``kill -9`` in the middle of the load and a restart, a clean stop on
SIGTERM, reads while writes go on, and the command's own refusals.

Loads are bounded (a fixed count of requests per client, deadlines on every
wait) and talk to loopback only.
"""

from __future__ import annotations

import json
import signal
import threading
import time
from collections import Counter

import pytest
from click.testing import CliRunner

from service_support import SPACE, ServerProcess, new_task, seed_archive
from warmstart.archive.store import Archive
from warmstart.cli import main
from warmstart.client import Client, ServiceError


def _worker(client: Client, study: int, pairs: int, answered: list, stop: threading.Event, errors: list) -> None:
    """Propose one config, 'evaluate' it (Branin, a published test function), record it; repeat."""
    from service_support import branin

    try:
        for _ in range(pairs):
            if stop.is_set():
                return
            lease = client.propose(study, k=1)[0]
            score = branin(lease["config"]["x1"], lease["config"]["x2"])
            answer = client.record(study, trial=lease["trial"], score=score)
            answered.append((lease["trial"], answer["number"], score))
    except Exception as exc:  # reported by the test
        errors.append(exc)


def test_concurrent_clients_kill_9_and_restart_lose_and_double_nothing(tmp_path):
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    server = ServerProcess(path).start()
    try:
        setup = Client(server.url)
        study = setup.new_study(new_task(), "bran", space=SPACE, metric="loss", maximize=False)["study_id"]
        answered: list = []
        errors: list = []
        stop = threading.Event()
        clients = [Client(server.url, retries=60, backoff=0.1, timeout=30) for _ in range(6)]
        threads = [threading.Thread(target=_worker, args=(c, study, 12, answered, stop, errors)) for c in clients]
        for t in threads:
            t.start()
        deadline = time.monotonic() + 120
        while len(answered) < 15 and time.monotonic() < deadline:  # kill in the middle of the load
            time.sleep(0.05)
        server.kill()
        killed_at = len(answered)
        time.sleep(0.5)
        server = ServerProcess(path, port=server.port).start()  # the same address: the clients retry into it
        for t in threads:
            t.join(timeout=240)
        stop.set()
        for c in clients:
            c.close()
        assert not any(t.is_alive() for t in threads)
        assert not errors, errors
        assert 15 <= killed_at < 72 and len(answered) == 72
        trials = setup.trials(study)
        leases = setup.leases(study, state="all")
        setup.close()
    finally:
        server.stop()
    by_trial = {int(row["trial"]): row for _, row in leases.iterrows()}
    recorded = trials.set_index("number")
    for trial, number, score in answered:  # every answered record is there, as answered
        assert by_trial[trial]["state"] == "recorded" and int(by_trial[trial]["number"]) == number
        assert recorded.loc[number, "score"] == pytest.approx(score)
    # nothing recorded twice: one trial per answered lease (a lease may also have been proposed and
    # lost with the kill, then expire; it never becomes a trial without a record)
    assert len(trials) == len(answered) == len({a[0] for a in answered})
    assert Counter(trials["number"]).most_common(1)[0][1] == 1
    result = CliRunner().invoke(main, ["--archive", str(path), "curate", "check"])
    assert result.exit_code == 0, result.output


def test_no_duplicate_config_among_leases_pending_at_once(tmp_path):
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    with ServerProcess(path) as server:
        client = Client(server.url)
        study = client.new_study(new_task(), "bran", space=SPACE, metric="loss", maximize=False)["study_id"]
        got: list = []

        def grab():
            with Client(server.url) as c:
                for _ in range(5):
                    got.extend(c.propose(study, k=2))

        threads = [threading.Thread(target=grab) for _ in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
        pending = client.leases(study)
        client.close()
    keys = [json.dumps(g["config"], sort_keys=True) for g in got]
    assert len(got) == 80 and len(set(keys)) == 80
    assert sorted(pending["trial"]) == sorted(g["trial"] for g in got)


def test_reads_answer_while_writes_go_on_and_sigterm_stops_cleanly(tmp_path):
    path = tmp_path / "team.duckdb"
    seed_archive(path)
    server = ServerProcess(path).start()
    client = Client(server.url)
    study = client.new_study(new_task(), "bran", space=SPACE, metric="loss", maximize=False)["study_id"]
    done = threading.Event()

    def write():
        with Client(server.url) as c:
            for i in range(40):
                lease = c.propose(study)[0]
                c.record(study, trial=lease["trial"], score=float(i))
        done.set()

    writer = threading.Thread(target=write)
    writer.start()
    reads = 0
    while not done.is_set() and reads < 400:
        assert len(client.studies()) == 4
        assert client.study(study)["study_id"] == study
        reads += 1
    writer.join(timeout=120)
    client.close()
    assert reads > 0 and done.is_set()
    assert server.stop(signal.SIGTERM) == 0
    log = server.log.read_text()
    assert "stopped on SIGTERM; queued writes finished, archive closed" in log
    assert "POST /api/v1/studies/4/trials 200" in log
    with Archive(path, read_only=True) as archive:  # the lock is gone and the work is in
        assert len(archive.trials(study)) == 40


def test_a_client_gets_a_clear_error_when_no_service_answers():
    client = Client("http://127.0.0.1:9", retries=1, backoff=0.01)  # port 9 (discard) is closed on loopback
    with client, pytest.raises(ServiceError, match=r"no answer from http://127.0.0.1:9 after 2 tries"):
        client.studies()


def test_serve_refuses_a_public_address_without_tokens_and_bad_token_files(tmp_path):
    runner = CliRunner()
    result = runner.invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "serve", "--host", "0.0.0.0"])
    assert result.exit_code == 1
    assert "--host 0.0.0.0 is not a loopback address" in result.stderr and "--token-file" in result.stderr
    assert not (tmp_path / "a.duckdb").exists()
    tokens = tmp_path / "tokens.toml"
    tokens.write_text('[dana]\ntoken = "0123456789abcdefgh"\nrole = "owner"\n')
    result = runner.invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "serve", "--token-file", str(tokens)])
    assert result.exit_code == 1
    assert "tokens.toml: [dana] role = 'owner' is not a role; use one of read, write, admin" in result.stderr
