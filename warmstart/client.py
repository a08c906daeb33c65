"""Talk to a team service (``warmstart serve``) with the archive's verbs.

The data never leaves this machine: a new task is sent as its fingerprint and
profile, computed here. Every write carries a fresh request id
(``Idempotency-Key``); when the answer is lost (connection dropped, server
restarting) the client sends the same request with the same id again, and
the service records it once. Only the standard library is used, so a training
job needs nothing but warmstart itself.

Examples
--------
>>> client = Client("http://127.0.0.1:8750", token=None)        # doctest: +SKIP
>>> lease = client.propose(study=3, k=1)[0]                      # doctest: +SKIP
>>> client.record(study=3, trial=lease["trial"], score=0.87)     # doctest: +SKIP
"""

from __future__ import annotations

import http.client
import io
import json
import os
import threading
import time
import uuid
import zipfile
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence
from urllib.parse import quote, urlencode, urlsplit

import pandas as pd

from warmstart.errors import WarmstartError

__all__ = ["Client", "ServiceError", "ServiceUnavailable", "task_description"]

RETRY_STATUSES = (502, 503, 504)


class ServiceError(WarmstartError):
    """The service refused a request (a 4xx, or a 5xx after the retries).

    Attributes
    ----------
    status : int
    error : str
    field : str or None
    value : any
    """

    def __init__(self, status: int, error: str, field: str | None = None, value: Any = None):
        where = f" [{field}]" if field else ""
        super().__init__(f"service answered {status}{where}: {error}")
        self.status, self.error, self.field, self.value = status, error, field, value


class ServiceUnavailable(ServiceError):
    """The service could not be reached within the retries."""


def task_description(frame: pd.DataFrame, target: str, name: str, kind: str | None = None,
                     keep_columns: Sequence[str] = (), source: str | None = None) -> dict:
    """What the service needs to know of a task: name, fingerprint, kind, sizes
    and profile, computed here from the data (which is not sent)."""
    from warmstart.archive.store import fingerprint
    from warmstart.profile import PROFILE_VERSION, detect_kind, profile

    kind = kind or detect_kind(frame[target])
    return {
        "name": name, "fingerprint": fingerprint(frame, target), "kind": kind, "target": target,
        "n_rows": int(frame.shape[0]), "n_features": int(frame.shape[1] - 1),
        "profile": profile(frame, target=target, kind=kind, keep_columns=keep_columns),
        "profile_version": PROFILE_VERSION, "source": source,
    }


class Client:
    """A connection to a warmstart team service.

    Parameters
    ----------
    url : str
        The service, e.g. ``http://127.0.0.1:8750``.
    token : str, optional
        Bearer token (default: ``$WARMSTART_TOKEN`` when set).
    timeout : float, default 60
        Seconds to wait for one answer.
    retries : int, default 5
        Further tries after a lost answer or a 502/503/504; writes keep
        their request id across tries.
    backoff : float, default 0.2
        First wait between tries in seconds (doubling, at most 5 s).
    """

    def __init__(self, url: str, token: str | None = None, timeout: float = 60.0, retries: int = 5,
                 backoff: float = 0.2):
        parts = urlsplit(url)
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise WarmstartError(f"service URL {url!r} is not http(s)://HOST[:PORT]; e.g. http://127.0.0.1:8750")
        self.url = url.rstrip("/")
        self._scheme, self._host = parts.scheme, parts.hostname
        self._port = parts.port or (443 if parts.scheme == "https" else 80)
        self._base = parts.path.rstrip("/")
        self.token = token if token is not None else os.environ.get("WARMSTART_TOKEN") or None
        self.timeout, self.retries, self.backoff = float(timeout), int(retries), float(backoff)
        self._local = threading.local()
        self._open: set[http.client.HTTPConnection] = set()
        self._open_lock = threading.Lock()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Client({self.url!r}, token={'set' if self.token else 'none'})"

    # -- transport -------------------------------------------------------------------
    def _connection(self) -> http.client.HTTPConnection:
        con = getattr(self._local, "con", None)
        if con is None:
            kind = http.client.HTTPSConnection if self._scheme == "https" else http.client.HTTPConnection
            con = kind(self._host, self._port, timeout=self.timeout)
            self._local.con = con
            with self._open_lock:
                self._open.add(con)
        return con

    def _drop_connection(self) -> None:
        con = getattr(self._local, "con", None)
        if con is not None:
            con.close()
            self._local.con = None
            with self._open_lock:
                self._open.discard(con)

    def close(self) -> None:
        """Close every connection this client opened (one per thread that used it)."""
        with self._open_lock:
            for con in self._open:
                con.close()
            self._open.clear()
        self._local = threading.local()

    def request(self, method: str, path: str, body: Any = None, query: Mapping | None = None,
                write: bool = False, raw: bool = False) -> Any:
        """Send one request and return the decoded JSON answer (or bytes with ``raw``).

        A write gets a fresh request id that every retry repeats.
        """
        target = self._base + path
        if query:
            target += "?" + urlencode([(k, v) for k, v in query.items() if v is not None], doseq=True)
        headers = {"Accept": "application/json"}
        data = None
        if body is not None:
            data = json.dumps(body, allow_nan=False).encode("utf-8")
            headers["Content-Type"] = "application/json"
        if self.token:
            headers["Authorization"] = f"Bearer {self.token}"
        if write:
            headers["Idempotency-Key"] = uuid.uuid4().hex
        last: Exception | None = None
        for attempt in range(self.retries + 1):
            if attempt:
                time.sleep(min(5.0, self.backoff * 2 ** (attempt - 1)))
            try:
                con = self._connection()
                con.request(method, target, body=data, headers=headers)
                response = con.getresponse()
                payload = response.read()
                status = response.status
                if response.getheader("Connection", "").lower() == "close":
                    self._drop_connection()
            except (OSError, http.client.HTTPException) as exc:  # refused, reset, timed out, lost answer
                self._drop_connection()
                last = exc
                continue
            if status in RETRY_STATUSES and attempt < self.retries:
                last = ServiceError(status, payload.decode("utf-8", "replace")[:200])
                continue
            if status >= 400:
                try:
                    error = json.loads(payload)
                except ValueError:
                    error = {"error": payload.decode("utf-8", "replace")[:500]}
                raise ServiceError(status, str(error.get("error")), error.get("field"), error.get("value"))
            if raw:
                return payload
            return json.loads(payload) if payload else None
        raise ServiceUnavailable(0, f"no answer from {self.url} after {self.retries + 1} tries ({last})")

    # -- reads -----------------------------------------------------------------------
    def health(self) -> dict:
        """The service's state: archive, schema version, who you are."""
        return self.request("GET", "/api/v1/health")

    def studies(self, learner: str | None = None, task: str | None = None, owner: str | None = None,
                tags: Mapping[str, str] | None = None) -> pd.DataFrame:
        """Studies, one row each (filters as in ``warmstart studies``)."""
        query = {"learner": learner, "task": task, "owner": owner,
                 "tag": [f"{k}={v}" for k, v in (tags or {}).items()] or None}
        return pd.DataFrame(self.request("GET", "/api/v1/studies", query=query))

    def study(self, study: int, top: int = 10) -> dict:
        """One study: its facts, space, best trials and best-so-far curve."""
        return self.request("GET", f"/api/v1/studies/{int(study)}", query={"top": top})

    def trials(self, study: int) -> pd.DataFrame:
        """Every trial of a study."""
        return pd.DataFrame(self.request("GET", f"/api/v1/studies/{int(study)}/trials"))

    def leases(self, study: int, state: str = "pending") -> pd.DataFrame:
        """Leases of a study (``pending``, ``recorded``, ``expired`` or ``all``)."""
        return pd.DataFrame(self.request("GET", f"/api/v1/studies/{int(study)}/leases", query={"state": state}))

    def neighbors(self, profile: Mapping[str, float], learner: str | None = None, k: int = 5) -> pd.DataFrame:
        """Past tasks ranked by similarity to ``profile``; ``attrs["notes"]`` as locally."""
        found = self.request("POST", "/api/v1/neighbors", {"profile": dict(profile), "learner": learner, "k": k})
        frame = pd.DataFrame(found["neighbors"])
        frame.attrs["notes"] = found["notes"]
        return frame

    def defaults(self, learner: str, near: Mapping[str, float] | None = None, n: int = 10,
                 kind: str | None = None) -> pd.DataFrame:
        """Configs that did well across many past tasks of ``learner``."""
        body = {"learner": learner, "near": None if near is None else dict(near), "n": n, "kind": kind}
        found = self.request("POST", "/api/v1/defaults", body)
        frame = pd.DataFrame(found["defaults"])
        frame.attrs["notes"] = found["notes"]
        return frame

    def prior(self, profile: Mapping[str, float], learner: str, space: Mapping | None = None,
              kind: str | None = None, exclude_fingerprint: str | None = None, n_seeds: int = 10) -> dict:
        """The prior a new study would start from: provenance, seeds and a summary."""
        return self.request("POST", "/api/v1/prior", {
            "profile": dict(profile), "learner": learner, "space": None if space is None else dict(space),
            "kind": kind, "exclude_fingerprint": exclude_fingerprint, "n_seeds": n_seeds})

    # -- writes ----------------------------------------------------------------------
    def new_study(self, task: Mapping, learner: str, space: Mapping | None = None, metric: str = "score",
                     maximize: bool | None = None, cold: bool = False, n_seeds: int | None = None,
                     tags: Mapping[str, str] | None = None, owner: str | None = None) -> dict:
        """Create a study; ``task`` from :func:`task_description`. Warm unless ``cold``."""
        return self.request("POST", "/api/v1/studies", {
            "task": dict(task), "learner": learner, "space": None if space is None else dict(space),
            "metric": metric, "maximize": maximize, "cold": cold, "n_seeds": n_seeds,
            "tags": dict(tags or {}), "owner": owner}, write=True)

    def propose(self, study: int, k: int = 1, lease_seconds: float | None = None) -> list[dict]:
        """Lease ``k`` distinct configs: ``[{"trial": id, "config": {...}, "expires_at": ...}]``."""
        body = {"k": int(k), "lease_seconds": lease_seconds}
        return self.request("POST", f"/api/v1/studies/{int(study)}/propose", body, write=True)["leases"]

    def record(self, study: int, trial: int | None = None, score: float | None = None,
               config: Mapping | None = None, failed: bool = False, error: str | None = None,
               cost_s: float | None = None) -> dict:
        """Record a result by lease id (``trial``) or, for a config never proposed, by ``config``.

        Returns the service's answer: ``trial``, ``number``, ``repeat`` (the
        trial was recorded before with the same result), ``best_score``,
        ``trial_count``.
        """
        body = {"trial": trial, "config": None if config is None else dict(config),
                "score": None if failed else score, "status": "failed" if failed else "ok", "error": error,
                "cost_s": cost_s}
        return self.request("POST", f"/api/v1/studies/{int(study)}/trials", body, write=True)

    def finish(self, study: int) -> dict:
        """Mark a study finished."""
        return self.request("POST", f"/api/v1/studies/{int(study)}/finish", write=True)

    def tag(self, study: int, tags: Mapping[str, str] | None = None, remove: Sequence[str] = (),
            owner: str | None = None) -> dict:
        """Set or remove tags of a study (changing the owner needs the admin role)."""
        return self.request("POST", f"/api/v1/studies/{int(study)}/tags",
                            {"set": dict(tags or {}), "remove": list(remove), "owner": owner}, write=True)

    def ingest(self, trials: pd.DataFrame, task: Mapping, learner: str, space: Mapping | None = None,
               metric: str = "score", maximize: bool | None = None, tags: Mapping[str, str] | None = None,
               owner: str | None = None) -> dict:
        """Add past trials (one column per parameter plus ``score``) as a new study."""
        rows = json.loads(trials.to_json(orient="records", date_format="iso"))
        rows = [{k: v for k, v in row.items() if v is not None} for row in rows]
        return self.request("POST", "/api/v1/ingest", {
            "task": dict(task), "learner": learner, "space": None if space is None else dict(space),
            "metric": metric, "maximize": maximize, "tags": dict(tags or {}), "owner": owner, "trials": rows},
            write=True)

    # -- curation (admin) ----------------------------------------------------------------
    def check(self) -> dict:
        """The archive's integrity report: ``{"ok": bool, "findings": [...]}``."""
        return self.request("GET", "/api/v1/curate/check")

    def export(self, directory: str | Path) -> Path:
        """Download the archive as a Parquet store into ``directory`` (new or empty)."""
        target = Path(directory)
        if target.exists() and any(target.iterdir()):
            raise WarmstartError(f"{target}: already exists and is not empty; give a new directory")
        data = self.request("GET", "/api/v1/curate/export", raw=True)
        target.mkdir(parents=True, exist_ok=True)
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            for member in archive.namelist():  # never outside the target
                resolved = (target / member).resolve()
                if target.resolve() not in resolved.parents and resolved != target.resolve():
                    raise WarmstartError(f"export holds a path outside the store: {member!r}; nothing more written")
            archive.extractall(target)
        return target

    # -- gain replays --------------------------------------------------------------------
    def gain(self, learner: str, budget: int = 10, repeats: int = 30, replay: str = "nearest",
             gamma: float = 0.05, seed: int = 0, tasks: Sequence[str] | None = None) -> dict:
        """Start a leave-one-task-out replay in the background; returns the job."""
        return self.request("POST", "/api/v1/gain", {
            "learner": learner, "budget": budget, "repeats": repeats, "replay": replay, "gamma": gamma,
            "seed": seed, "tasks": None if tasks is None else list(tasks)})

    def gain_job(self, job: str) -> dict:
        """A replay's state, progress and (when done) result."""
        return self.request("GET", f"/api/v1/gain/jobs/{quote(job, safe='')}")

    def wait_gain(self, job: str, poll: float = 1.0, timeout: float = 3600.0,
                  progress: Callable[[int, int], None] | None = None) -> dict:
        """Poll a replay until it is done (or failed); returns its last state."""
        deadline = time.monotonic() + timeout
        while True:
            state = self.gain_job(job)
            if progress is not None:
                progress(state["progress"]["done"], state["progress"]["total"])
            if state["state"] in ("done", "failed", "stopped"):
                return state
            if time.monotonic() > deadline:
                raise ServiceUnavailable(0, f"gain job {job} not done after {timeout:.0f} s")
            time.sleep(poll)

