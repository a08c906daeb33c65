"""The fast lane answers propose and record exactly as their FastAPI routes do.

One sequence of requests -- ordinary ones and ones the lane must hand on
(no token, a read token, bad JSON, a field out of range, a wrong content
type, a bad request id) -- goes to two services over copies of one seeded
archive, one with the lane and one without; every answer (status, JSON
body, the headers a client reads) must be the same, and the lane must
have taken exactly the ordinary ones. Status codes per RFC 9110, Bearer
challenges per RFC 6750.
"""

from __future__ import annotations

import shutil

import pytest
from fastapi.testclient import TestClient

from service_support import SPACE, new_task, seed_archive
from warmstart.archive.store import Archive
from warmstart.service import Tokens, create_app

TOKENS = {"dana": ("dana-token-0123456789", "write"), "lee": ("lee-token-0123456789ab", "read")}
DANA = {"Authorization": f"Bearer {TOKENS['dana'][0]}"}
LEE = {"Authorization": f"Bearer {TOKENS['lee'][0]}"}
READ_HEADERS = ("content-type", "idempotent-replayed", "www-authenticate")


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("lane") / "team.duckdb"
    seed_archive(path)
    return path


def _masked(body):
    """The answer with lease expiries (clock time) blanked."""
    if isinstance(body, dict):
        return {k: ("<time>" if k == "expires_at" else _masked(v)) for k, v in body.items()}
    if isinstance(body, list):
        return [_masked(v) for v in body]
    return body


def _run(path, fast_lane: bool) -> tuple[list, int]:
    """Send the sequence; returns every answer and the count the lane took."""
    app = create_app(Archive(path), tokens=Tokens(TOKENS), fast_lane=fast_lane)
    answers = []
    with TestClient(app, raise_server_exceptions=False) as c:
        r = c.post("/api/v1/studies", headers=DANA, json={
            "task": new_task(name="shop lane"), "learner": "bran", "space": SPACE, "metric": "loss",
            "maximize": False})
        assert r.status_code == 201, r.text
        study = r.json()["study_id"]
        base = f"/api/v1/studies/{study}"

        def send(url, *, json=None, content=None, headers=DANA, **extra):
            r = c.post(url, json=json, content=content, headers={**headers, **extra})
            answers.append((url.replace(str(study), "S"), r.status_code, _masked(r.json()),
                            {h: r.headers.get(h) for h in READ_HEADERS}))
            return r.json()

        leases = send(f"{base}/propose", json={"k": 3})["leases"]
        send(f"{base}/propose", json={"k": 2}, **{"Idempotency-Key": "p-1"})
        send(f"{base}/propose", json={"k": 2}, **{"Idempotency-Key": "p-1"})  # a retry: the stored answer
        send(f"{base}/propose", json={"k": 1, "lease_seconds": 0.5})
        send(f"{base}/trials", json={"trial": leases[0]["trial"], "score": 1.5})
        send(f"{base}/trials", json={"trial": leases[0]["trial"], "score": 1.5})  # a repeat
        send(f"{base}/trials", json={"trial": leases[0]["trial"], "score": 2.5})  # 409: another result
        send(f"{base}/trials", json={"trial": leases[1]["trial"], "status": "failed", "error": "out of memory"})
        send(f"{base}/trials", json={"config": {"x1": 1.0, "x2": 2.0}, "score": 3.0})
        send(f"{base}/trials", json={"config": {"x1": 99.0, "x2": 2.0}, "score": 3.0})  # 422: outside the space
        send(f"{base}/trials", json={"trial": leases[2]["trial"]})  # 422: no score for status ok
        send(f"{base}/trials", json={"trial": 10**9, "score": 1.0})  # 404: no such trial
        send(f"{base}/trials", json={"config": {"x1": 1.0, "x2": 3.0}, "score": 1.0},
             **{"Idempotency-Key": "p-1"})  # 422: the id was used for another request
        send("/api/v1/studies/999999/propose", json={"k": 1})  # 404: no such study
        ordinary = len(answers)
        # handed on to the routes: each answered by FastAPI in the one error shape
        send(f"{base}/propose", json={"k": 1}, headers=LEE)  # 403
        send(f"{base}/propose", json={"k": 1}, headers={})  # 401
        send(f"{base}/propose", json={"k": 1}, headers={"Authorization": "Bearer not-a-token-at-all"})  # 401
        send(f"{base}/propose", content=b'{"k": 1', headers={**DANA, "Content-Type": "application/json"})  # 400
        send(f"{base}/propose", json={"k": 0})  # 422: k out of range
        send(f"{base}/propose", json={"k": 1, "colour": "red"})  # 422: unknown field
        send(f"{base}/propose", content=b'{"k": 1}', headers={**DANA, "Content-Type": "text/plain"})  # 415
        send(f"{base}/propose", json={"k": 1}, **{"Idempotency-Key": "has space"})  # 422
        send(f"{base}/trials", json={"trial": "7", "score": 1.0})  # 422: strict types
        send("/api/v1/studies/0/propose", json={"k": 1})  # 422: study id below 1
        send(f"{base}/trials", json=[1, 2])  # 422: not an object
        assert len(answers) - ordinary >= 11
        taken = getattr(app.state, "fast_lane", None)
        return answers, (taken.taken if taken is not None else 0), ordinary


def test_the_lane_answers_as_the_routes_do_and_hands_on_what_is_not_ordinary(seeded_file, tmp_path):
    a, b = tmp_path / "a.duckdb", tmp_path / "b.duckdb"
    shutil.copy(seeded_file, a)
    shutil.copy(seeded_file, b)
    with_lane, taken, ordinary = _run(a, fast_lane=True)
    without, not_taken, _ = _run(b, fast_lane=False)
    assert taken == ordinary and not_taken == 0
    for mine, theirs in zip(with_lane, without, strict=True):
        assert mine == theirs
    statuses = [status for _, status, _, _ in with_lane]
    # the sequence covers answers of every kind, so the comparison above means something
    assert {200, 400, 401, 403, 404, 409, 415, 422} <= set(statuses)
    assert with_lane[2][3]["idempotent-replayed"] == "true" and with_lane[1][3]["idempotent-replayed"] is None


def test_a_lane_answer_is_in_the_archive_and_logged_with_its_owner(seeded_file, tmp_path, caplog):
    path = tmp_path / "c.duckdb"
    shutil.copy(seeded_file, path)
    app = create_app(Archive(path), tokens=Tokens(TOKENS))
    with caplog.at_level("INFO", logger="warmstart.service"), TestClient(app) as c:
        study = c.post("/api/v1/studies", headers=DANA, json={
            "task": new_task(name="shop log"), "learner": "bran", "space": SPACE, "metric": "loss",
            "maximize": False}).json()["study_id"]
        lease = c.post(f"/api/v1/studies/{study}/propose", json={"k": 1}, headers=DANA).json()["leases"][0]
        r = c.post(f"/api/v1/studies/{study}/trials", json={"trial": lease["trial"], "score": 0.25},
                   headers={**DANA, "Idempotency-Key": "job-1"})
        assert r.status_code == 200 and app.state.fast_lane.taken == 2
        rows = c.app.state.service.reader().trials(study)
        assert list(rows["score"]) == [0.25]
    lines = [rec.getMessage() for rec in caplog.records if "/trials" in rec.getMessage()]
    assert lines and "who=dana" in lines[-1] and "request_id=job-1" in lines[-1]
    assert TOKENS["dana"][0] not in caplog.text  # never a token in the log
