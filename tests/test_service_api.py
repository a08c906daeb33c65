"""The team service's API, in process (FastAPI's test client) over a real
DuckDB file: studies, leases, records by trial id, request ids, roles, the
one error shape, and at least 30 malformed requests that change nothing.

HTTP semantics checked against RFC 9110 (status codes), RFC 6750 (Bearer
tokens: 401 with WWW-Authenticate) and the IETF Idempotency-Key draft
(a retried request with the same key gets the first answer).
"""

from __future__ import annotations

import io
import json
import logging
import time
import zipfile

import pytest
from fastapi.testclient import TestClient

from service_support import SPACE, dump, new_task, seed_archive
from warmstart.archive.store import Archive
from warmstart.service import Tokens, create_app

TOKENS = {"dana": ("dana-token-0123456789", "write"), "lee": ("lee-token-0123456789ab", "read"),
          "ada": ("ada-token-0123456789abc", "admin")}


def bearer(name: str) -> dict:
    return {"Authorization": f"Bearer {TOKENS[name][0]}"}


@pytest.fixture
def seeded(tmp_path):
    path = tmp_path / "team.duckdb"
    studies = seed_archive(path)
    return path, studies


@pytest.fixture
def client(seeded):
    path, _ = seeded
    with TestClient(create_app(Archive(path)), raise_server_exceptions=False) as c:
        yield c


@pytest.fixture
def token_client(seeded):
    path, _ = seeded
    with TestClient(create_app(Archive(path), tokens=Tokens(TOKENS)), raise_server_exceptions=False) as c:
        yield c


def view(c: TestClient):
    return c.app.state.service.reader()


def new_study(c: TestClient, headers=None, cold=False, name="shop new") -> int:
    r = c.post("/api/v1/studies", json={"task": new_task(name=name), "learner": "bran", "space": SPACE,
                                        "metric": "loss", "maximize": False, "cold": cold}, headers=headers)
    assert r.status_code == 201, r.text
    return r.json()["study_id"]


# -- studies and leases ----------------------------------------------------------------
def test_new_study_is_warm_from_the_seeded_history(client, seeded):
    r = client.post("/api/v1/studies", json={"task": new_task(), "learner": "bran", "space": SPACE,
                                             "metric": "loss", "maximize": False, "tags": {"team": "pricing"}})
    assert r.status_code == 201
    body = r.json()
    assert body["origin"] == "warm" and "warm start from 3 past studies of 'bran'" in body["note"]
    listed = client.get("/api/v1/studies", params={"tag": "team=pricing"}).json()
    assert [s["study_id"] for s in listed] == [body["study_id"]]
    shown = client.get(f"/api/v1/studies/{body['study_id']}").json()
    assert shown["space"]["params"]["x1"]["low"] == -5.0 and shown["trial_count"] == 0


def test_leases_are_distinct_while_pending_and_recorded_once(client):
    study = new_study(client)
    leases = []
    for _ in range(4):  # four workers asking one after another, none recording yet
        r = client.post(f"/api/v1/studies/{study}/propose", json={"k": 3})
        assert r.status_code == 200
        leases += r.json()["leases"]
    keys = [json.dumps(lease["config"], sort_keys=True) for lease in leases]
    assert len(set(keys)) == len(keys) == 12
    assert len({lease["trial"] for lease in leases}) == 12
    pending = client.get(f"/api/v1/studies/{study}/leases").json()
    assert sorted(p["trial"] for p in pending) == sorted(lease["trial"] for lease in leases)
    for lease in leases:
        r = client.post(f"/api/v1/studies/{study}/trials", json={"trial": lease["trial"], "score": 1.5})
        assert r.status_code == 200 and r.json()["repeat"] is False
    again = client.post(f"/api/v1/studies/{study}/trials", json={"trial": leases[0]["trial"], "score": 1.5})
    assert again.status_code == 200 and again.json()["repeat"] is True
    other = client.post(f"/api/v1/studies/{study}/trials", json={"trial": leases[0]["trial"], "score": 2.5})
    assert other.status_code == 409 and other.json()["field"] == "score"  # RFC 9110: conflict with the state
    assert len(view(client).trials(study)) == 12
    assert client.get(f"/api/v1/studies/{study}/leases").json() == []


def test_a_retry_with_the_same_request_id_records_once(client):
    study = new_study(client)
    lease = client.post(f"/api/v1/studies/{study}/propose", json={"k": 1}).json()["leases"][0]
    body = {"trial": lease["trial"], "score": 0.7}
    first = client.post(f"/api/v1/studies/{study}/trials", json=body, headers={"Idempotency-Key": "job-7-try"})
    retry = client.post(f"/api/v1/studies/{study}/trials", json=body, headers={"Idempotency-Key": "job-7-try"})
    assert first.status_code == retry.status_code == 200
    assert retry.json() == first.json() and retry.headers["Idempotent-Replayed"] == "true"
    assert "Idempotent-Replayed" not in first.headers
    reused = client.post(f"/api/v1/studies/{study}/trials", json={"config": {"x1": 1.0, "x2": 2.0}, "score": 3.0},
                         headers={"Idempotency-Key": "job-7-try"})
    assert reused.status_code == 422 and reused.json()["field"] == "Idempotency-Key"
    assert len(view(client).trials(study)) == 1
    # a proposal retried with its id hands out the same leases, not new ones
    a = client.post(f"/api/v1/studies/{study}/propose", json={"k": 2}, headers={"Idempotency-Key": "p-1"}).json()
    b = client.post(f"/api/v1/studies/{study}/propose", json={"k": 2}, headers={"Idempotency-Key": "p-1"}).json()
    assert a == b and len(client.get(f"/api/v1/studies/{study}/leases").json()) == 2


def test_an_expired_lease_is_released_and_a_late_result_still_counts(client):
    study = new_study(client, cold=True)
    first = client.post(f"/api/v1/studies/{study}/propose", json={"k": 2, "lease_seconds": 0.05}).json()["leases"]
    time.sleep(0.2)
    r = client.post(f"/api/v1/studies/{study}/propose", json={"k": 1}).json()
    assert r["expired"] == 2
    states = {row["trial"]: row["state"] for row in
              client.get(f"/api/v1/studies/{study}/leases", params={"state": "all"}).json()}
    assert states[first[0]["trial"]] == states[first[1]["trial"]] == "expired"
    late = client.post(f"/api/v1/studies/{study}/trials", json={"trial": first[0]["trial"], "score": 4.0})
    assert late.status_code == 200 and late.json()["number"] == 1


def test_a_lease_of_another_study_is_refused(client):
    a, b = new_study(client, name="shop a"), new_study(client, name="shop b")
    lease = client.post(f"/api/v1/studies/{a}/propose", json={}).json()["leases"][0]
    r = client.post(f"/api/v1/studies/{b}/trials", json={"trial": lease["trial"], "score": 1.0})
    assert r.status_code == 409 and r.json()["field"] == "trial"
    assert f"lease of study {a}, not of study {b}" in r.json()["error"]


def test_pending_leases_survive_a_restart(seeded):
    path, _ = seeded
    with TestClient(create_app(Archive(path))) as c:
        study = new_study(c)
        held = c.post(f"/api/v1/studies/{study}/propose", json={"k": 5}).json()["leases"]
    with TestClient(create_app(Archive(path))) as c:  # a new process would read the same rows
        pending = c.get(f"/api/v1/studies/{study}/leases").json()
        assert sorted(p["trial"] for p in pending) == sorted(h["trial"] for h in held)
        fresh = c.post(f"/api/v1/studies/{study}/propose", json={"k": 5}).json()["leases"]
        keys = {json.dumps(x["config"], sort_keys=True) for x in held + fresh}
        assert len(keys) == 10
        r = c.post(f"/api/v1/studies/{study}/trials", json={"trial": held[0]["trial"], "score": 2.0})
        assert r.status_code == 200 and r.json()["number"] == 1


def test_record_a_config_never_proposed_and_read_it_back(client):
    study = new_study(client)
    r = client.post(f"/api/v1/studies/{study}/trials", json={"config": {"x1": 3.0, "x2": 2.5}, "score": 1.25})
    assert r.status_code == 200 and r.json()["trial_count"] == 1
    failed = client.post(f"/api/v1/studies/{study}/trials",
                         json={"config": {"x1": 4.0, "x2": 2.5}, "status": "failed", "error": "out of memory"})
    assert failed.status_code == 200 and failed.json()["status"] == "failed"
    trials = client.get(f"/api/v1/studies/{study}/trials").json()
    assert [t["config"] for t in trials] == [{"x1": 3.0, "x2": 2.5}, {"x1": 4.0, "x2": 2.5}]
    assert trials[1]["status"] == "failed" and trials[1]["error"] == "out of memory"
    shown = client.get(f"/api/v1/studies/{study}").json()
    assert [c["best"] for c in shown["curve"]] == [1.25, 1.25]


def test_ingest_tag_neighbors_defaults_prior(client, seeded):
    trials = [{"x1": float(i), "x2": 2.0 * i, "score": 5.0 + i} for i in range(6)]
    r = client.post("/api/v1/ingest", json={"task": new_task(3, "shop four"), "learner": "bran", "space": SPACE,
                                            "metric": "loss", "maximize": False, "owner": "kim", "trials": trials})
    assert r.status_code == 201, r.text
    assert r.json()["trials"] == 6 and r.json()["best_score"] == 5.0 and r.json()["owner"] == "kim"
    study = r.json()["study_id"]
    tagged = client.post(f"/api/v1/studies/{study}/tags", json={"set": {"site": "north"}}).json()
    assert tagged["tags"] == {"site": "north"}
    prof = new_task()["profile"]
    near = client.post("/api/v1/neighbors", json={"profile": prof, "learner": "bran", "k": 2}).json()
    assert len(near["neighbors"]) == 2
    local = view(client).neighbors(prof, learner="bran", k=2)  # the same function, read directly
    assert [n["task_id"] for n in near["neighbors"]] == local["task_id"].tolist()
    defaults = client.post("/api/v1/defaults", json={"learner": "bran", "n": 3}).json()["defaults"]
    assert len(defaults) == 3
    prior = client.post("/api/v1/prior", json={"profile": prof, "learner": "bran", "space": SPACE}).json()
    assert prior["provenance"]["n_studies"] == 4 and len(prior["seeds"]) == 10


def test_curate_check_export_and_gain_job(client, tmp_path):
    assert client.get("/api/v1/curate/check").json()["ok"] is True
    r = client.get("/api/v1/curate/export")
    assert r.status_code == 200 and r.headers["content-type"] == "application/zip"
    names = zipfile.ZipFile(io.BytesIO(r.content)).namelist()
    assert "manifest.json" in names and any(n.startswith("trials/learner=bran/") for n in names)
    job = client.post("/api/v1/gain", json={"learner": "bran", "budget": 3, "repeats": 2}).json()
    assert job["state"] in ("queued", "running")
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        state = client.get(job["url"]).json()
        if state["state"] in ("done", "failed"):
            break
        time.sleep(0.2)
    assert state["state"] == "done", state
    assert state["progress"]["done"] == state["progress"]["total"] > 0
    assert state["result"]["pooled"]["n_tasks"] == 3
    latest = client.get("/api/v1/gain/latest").json()
    assert latest["result"] == state["result"] and latest["report_id"] == state["report_id"]


def test_gain_jobs_after_a_restart_read_done_or_failed_never_running(seeded):
    path, _ = seeded
    with TestClient(create_app(Archive(path)), raise_server_exceptions=False) as c:
        done = c.post("/api/v1/gain", json={"learner": "bran", "budget": 3, "repeats": 2}).json()
        deadline = time.monotonic() + 120
        while c.get(done["url"]).json()["state"] not in ("done", "failed") and time.monotonic() < deadline:
            time.sleep(0.2)
        first = c.get(done["url"]).json()
        assert first["state"] == "done", first
        # two more, the second still queued behind the first when the service stops (a restart)
        c.post("/api/v1/gain", json={"learner": "bran", "budget": 3, "repeats": 2})
        cut = c.post("/api/v1/gain", json={"learner": "bran", "budget": 3, "repeats": 2}).json()
    with TestClient(create_app(Archive(path)), raise_server_exceptions=False) as c:  # the service again
        again = c.get(done["url"]).json()  # finished before: its stored report
        assert again["state"] == "done" and again["result"] == first["result"]
        assert again["report_id"] == first["report_id"]
        lost = c.get(cut["url"])
        assert lost.status_code == 200 and lost.json()["state"] == "failed"
        assert "stopped (a restart or a crash) before it finished" in lost.json()["error"]
        mine = c.app.state.service.jobs.run_id + "0" * 8  # this run never gave that id
        unknown = c.get(f"/api/v1/gain/jobs/{mine}")
        assert unknown.status_code == 404 and unknown.json()["field"] == "job_id"
        assert "job" not in c.get("/api/v1/gain/latest").json()["options"]


# -- tokens and roles ---------------------------------------------------------------------
def test_tokens_roles_and_owner(token_client, caplog):
    c = token_client
    caplog.set_level(logging.INFO, logger="warmstart.service")
    missing = c.get("/api/v1/studies")
    assert missing.status_code == 401 and missing.headers["WWW-Authenticate"] == "Bearer"  # RFC 6750
    wrong = c.get("/api/v1/studies", headers={"Authorization": "Bearer not-a-token-at-all"})
    assert wrong.status_code == 401 and wrong.json()["field"] == "Authorization"
    assert c.get("/api/v1/studies", headers=bearer("lee")).status_code == 200
    refused = c.post("/api/v1/studies", json={"task": new_task(), "learner": "bran", "space": SPACE},
                     headers=bearer("lee"))
    assert refused.status_code == 403
    study = new_study(c, headers=bearer("dana"))
    assert c.get(f"/api/v1/studies/{study}", headers=bearer("lee")).json()["owner"] == "dana"
    assert c.get("/api/v1/curate/check", headers=bearer("dana")).status_code == 403
    assert c.get("/api/v1/curate/check", headers=bearer("ada")).status_code == 200
    other = c.post("/api/v1/studies", json={"task": new_task(), "learner": "bran", "space": SPACE, "owner": "lee"},
                   headers=bearer("dana"))
    assert other.status_code == 403 and other.json()["field"] == "owner"
    assert c.post(f"/api/v1/studies/{study}/tags", json={"owner": "lee"}, headers=bearer("dana")).status_code == 403
    page = c.get("/")
    assert page.status_code == 401 and page.headers["WWW-Authenticate"].startswith("Basic")
    assert c.get("/", auth=("lee", TOKENS["lee"][0])).status_code == 200
    assert c.get("/", auth=("dana", TOKENS["lee"][0])).status_code == 401  # a name with another's token
    logged = "\n".join(r.getMessage() for r in caplog.records)
    assert "who=dana" in logged and "who=lee" in logged
    for token, _ in TOKENS.values():
        assert token not in logged
    for r in (missing, wrong, refused, other):
        assert all(token not in r.text for token, _ in TOKENS.values())


def test_token_file_errors(tmp_path):
    from warmstart.service.auth import TokenError

    path = tmp_path / "tokens.toml"
    path.write_text('[dana]\ntoken = "short"\nrole = "write"\n')
    with pytest.raises(TokenError, match=r"\[dana\] token is 5 characters long; use at least 16"):
        Tokens.load(path)
    path.write_text('[dana]\ntoken = "0123456789abcdefgh"\nrole = "boss"\n')
    with pytest.raises(TokenError, match=r"\[dana\] role = 'boss' is not a role; use one of read, write, admin"):
        Tokens.load(path)
    path.write_text('[dana]\ntoken = "0123456789abcdefgh"\nrole = "read"\n[lee]\ntoken = "0123456789abcdefgh"\n'
                    'role = "read"\n')
    with pytest.raises(TokenError, match=r"\[lee\] and \[dana\] have the same token"):
        Tokens.load(path)
    path.write_text("[dana\n")
    with pytest.raises(TokenError, match="not valid TOML"):
        Tokens.load(path)


# -- malformed requests: each a 4xx naming the field, nothing changed ------------------------------
def _cases(study: int, lease_of_other: int, other: int) -> list[tuple]:
    task = new_task()
    good = {"task": task, "learner": "bran", "space": SPACE, "metric": "loss", "maximize": False}
    propose, trials = f"/api/v1/studies/{study}/propose", f"/api/v1/studies/{study}/trials"
    js = {"Content-Type": "application/json"}
    return [
        ("bad JSON", "POST", propose, {"content": b'{"k": 2,', "headers": js}, 400, "body"),
        ("JSON array body", "POST", propose, {"json": [1, 2]}, 422, "body"),
        ("no content type", "POST", propose, {"content": b'{"k": 1}'}, 415, "Content-Type"),
        ("k as text", "POST", propose, {"json": {"k": "3"}}, 422, "k"),
        ("k zero", "POST", propose, {"json": {"k": 0}}, 422, "k"),
        ("k too many", "POST", propose, {"json": {"k": 100000}}, 422, "k"),
        ("unknown field", "POST", propose, {"json": {"k": 1, "kk": 2}}, 422, "kk"),
        ("negative lease", "POST", propose, {"json": {"k": 1, "lease_seconds": -5}}, 422, "lease_seconds"),
        ("study id not a number", "POST", "/api/v1/studies/1;DROP TABLE trials/propose", {"json": {}}, 422,
         "study_id"),
        ("unknown study", "POST", "/api/v1/studies/999/propose", {"json": {}}, 404, "study_id"),
        ("unknown trial", "POST", trials, {"json": {"trial": 99999, "score": 1.0}}, 404, "trial"),
        ("lease of another study", "POST", trials, {"json": {"trial": lease_of_other, "score": 1.0}}, 409, "trial"),
        ("score as text", "POST", trials, {"json": {"config": {"x1": 1.0, "x2": 1.0}, "score": "high"}}, 422,
         "score"),
        ("score missing for ok", "POST", trials, {"json": {"config": {"x1": 1.0, "x2": 1.0}}}, 422, "score"),
        ("trial and config both", "POST", trials, {"json": {"trial": 1, "config": {"x1": 1.0}, "score": 1.0}}, 422,
         "trial"),
        ("config out of the space", "POST", trials, {"json": {"config": {"x1": 99.0, "x2": 1.0}, "score": 1.0}},
         422, "config"),
        ("config with an unknown parameter", "POST", trials,
         {"json": {"config": {"x1": 1.0, "x2": 1.0, "x3": 0}, "score": 1.0}}, 422, "config"),
        ("config missing a parameter", "POST", trials, {"json": {"config": {"x1": 1.0}, "score": 1.0}}, 422, "config"),
        ("status not known", "POST", trials, {"json": {"config": {"x1": 1.0, "x2": 1.0}, "score": 1.0,
                                                       "status": "great"}}, 422, "status"),
        ("negative cost", "POST", trials, {"json": {"config": {"x1": 1.0, "x2": 1.0}, "score": 1.0, "cost_s": -1}},
         422, "cost_s"),
        ("oversized body", "POST", propose, {"content": b'{"k": 1, "pad": "' + b"x" * (2 << 20) + b'"}',
                                             "headers": js}, 413, "body"),
        ("oversized ingest", "POST", "/api/v1/ingest", {"content": b"[" + b" " * (40 << 20) + b"]", "headers": js},
         413, "body"),
        ("SQL-ish learner", "POST", "/api/v1/studies", {"json": {**good, "learner": "bran'; DROP TABLE trials; --"}},
         422, "learner"),
        ("path-like task name", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "name": "../../etc/passwd"}}}, 422, "task.name"),
        ("control characters in a task name", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "name": "shop\nnew"}}}, 422, "task.name"),
        ("fingerprint not hex", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "fingerprint": "abc"}}}, 422, "task.fingerprint"),
        ("profile of another version", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "profile_version": "0"}}}, 422, "task.profile_version"),
        ("unknown meta-feature", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "profile": {**task["profile"], "secret_sauce": 1.0}}}}, 422,
         "task.profile"),
        ("profile value not a number", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "profile": {**task["profile"], "log_rows": "many"}}}}, 422,
         "task.profile.log_rows"),
        ("kind contradicts the profile", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "kind": "regression"}}}, 422, "task.kind"),
        ("space with a bad bound", "POST", "/api/v1/studies",
         {"json": {**good, "space": {"params": {"x1": {"type": "real", "low": 5, "high": 1}}}}}, 422, "space"),
        ("no space for a learner not built in", "POST", "/api/v1/studies", {"json": {**good, "space": None}}, 422,
         "space"),
        ("a task name taken by other data", "POST", "/api/v1/studies",
         {"json": {**good, "task": {**task, "name": "shop 1"}}}, 409, "task.name"),
        ("maximize contradicts a built-in metric", "POST", "/api/v1/studies",
         {"json": {**good, "metric": "rmse", "maximize": True}}, 422, "maximize"),
        ("ingest rows outside the space", "POST", "/api/v1/ingest",
         {"json": {**good, "trials": [{"x1": 50.0, "x2": 1.0, "score": 1.0}]}}, 422, "trials"),
        ("ingest without rows", "POST", "/api/v1/ingest", {"json": {**good, "trials": []}}, 422, "trials"),
        ("tag key SQL-ish", "POST", f"/api/v1/studies/{study}/tags", {"json": {"set": {"a' OR 1=1": "x"}}}, 422, "set"),
        ("remove a tag that is not there", "POST", f"/api/v1/studies/{other}/tags", {"json": {"remove": ["nope"]}},
         422, "remove"),
        ("unknown sort key", "GET", "/api/v1/studies", {"params": {"order": "score; DROP TABLE studies"}}, 422,
         "order"),
        ("tag filter without =", "GET", "/api/v1/studies", {"params": {"tag": "team"}}, 422, "tag"),
        ("neighbors of an unknown learner", "POST", "/api/v1/neighbors",
         {"json": {"profile": task["profile"], "learner": "nothing"}}, 422, "learner"),
        ("empty profile", "POST", "/api/v1/neighbors", {"json": {"profile": {}}}, 422, "profile"),
        ("gain job id path-like", "GET", "/api/v1/gain/jobs/..%5C..%5Cetc", {}, 422, "job_id"),
        ("a path that climbs out", "GET", "/api/v1/gain/jobs/..%2F..%2Fetc%2Fpasswd", {}, 404, "path"),
        ("request id with spaces", "POST", propose, {"json": {"k": 1}, "headers": {"Idempotency-Key": "a b c"}}, 422,
         "Idempotency-Key"),
        ("unknown address", "GET", "/api/v1/nothing-here", {}, 404, "path"),
        ("method not allowed", "DELETE", "/api/v1/studies", {}, 405, "method"),
    ]


def test_malformed_requests_are_4xx_naming_the_field_and_change_nothing(client):
    study = new_study(client, name="shop x")
    other = new_study(client, name="shop y")
    lease_of_other = client.post(f"/api/v1/studies/{other}/propose", json={}).json()["leases"][0]["trial"]
    cases = _cases(study, lease_of_other, other)
    assert len(cases) >= 30
    before = dump(view(client).con)
    for name, method, path, kwargs, status, field in cases:
        r = client.request(method, path, **kwargs)
        assert r.status_code == status, (name, r.status_code, r.text[:300])
        body = r.json()
        assert set(body) == {"error", "field", "value"}, name
        assert body["field"] == field, (name, body)
        assert body["error"], name
    assert dump(view(client).con) == before


def test_a_fault_of_the_service_is_a_500_in_the_same_shape(client, monkeypatch):
    from warmstart.archive.store import Archive as ArchiveClass

    def broken(self):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(ArchiveClass, "studies", broken)
    r = client.get("/api/v1/studies")
    assert r.status_code == 500
    assert r.json() == {"error": "internal error of the service; the server log has the details", "field": None,
                        "value": None}


def test_openapi_description_at_a_stable_url(client):
    spec = client.get("/api/v1/openapi.json").json()
    assert spec["openapi"].startswith("3.")
    for path in ("/api/v1/studies", "/api/v1/studies/{study_id}/propose", "/api/v1/studies/{study_id}/trials",
                 "/api/v1/ingest", "/api/v1/neighbors", "/api/v1/gain"):
        assert path in spec["paths"], path
