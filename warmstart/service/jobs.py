"""Gain replays as background jobs: started by a request, run one at a time
in a thread of their own on a read-only view, with progress to poll and a
result to fetch. A finished replay is stored in the archive (table
``gain_reports``, through the writer, with its job id) so the web page shows
the latest one after a restart too, and its job still reads ``done``; the
jobs themselves live in memory. A job id starts with the id of the service
run that took it, so after a restart (or a crash) a job of an earlier run
that never finished reads ``failed``, saying that the service stopped
before it finished -- never ``running`` for ever.
"""

from __future__ import annotations

import json
import queue
import threading
import time
import uuid
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    from warmstart.service.core import Service

__all__ = ["GainJobs", "GainJob", "gain_result_body"]

MAX_KEPT = 50  # finished jobs remembered


class _Stopped(Exception):
    """Raised from the progress callback when the service shuts down."""


def _now_text() -> str:
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


@dataclass
class GainJob:
    """One replay: what was asked, by whom, how far it got, what came out."""

    job_id: str
    owner: str | None
    options: dict
    state: str = "queued"  # queued | running | done | failed | stopped
    done: int = 0
    total: int = 0
    created_at: str = field(default_factory=_now_text)
    started_at: str | None = None
    finished_at: str | None = None
    result: Any = None
    error: str | None = None
    report_id: int | None = None

    def to_dict(self, with_result: bool = True) -> dict:
        out = {
            "job": self.job_id, "state": self.state, "owner": self.owner, "options": self.options,
            "progress": {"done": self.done, "total": self.total}, "created_at": self.created_at,
            "started_at": self.started_at, "finished_at": self.finished_at, "error": self.error,
            "report_id": self.report_id,
        }
        if with_result:
            out["result"] = self.result
        return out


def gain_result_body(result) -> dict:
    """A replay result as JSON: the pooled figures, per-task rows and curves."""
    from warmstart.service.core import jsonable

    return jsonable({
        "learner": result.learner, "budget": result.budget, "repeats": result.repeats, "gamma": result.gamma,
        "replay": getattr(result, "objective", "live"), "pooled": result.pooled.to_dict(),
        "tasks": result.to_frame().to_dict(orient="records"),
        "curves": {label: {"hit_rate": list(c[0]), "regret": list(c[1])} for label, c in result.curves.items()},
    })


class GainJobs:
    """The queue of gain replays of one service."""

    def __init__(self, service: "Service"):
        self.service = service
        #: the id of this service run: the first 8 hex digits of every job id it gives
        self.run_id = uuid.uuid4().hex[:8]
        self.started_at = _now_text()
        self._jobs: dict[str, GainJob] = {}
        self._order: list[str] = []
        self._lock = threading.Lock()
        self._queue: queue.Queue[GainJob | None] = queue.Queue()
        self._thread: threading.Thread | None = None
        self._stopping = threading.Event()

    def submit(self, options: dict, owner: str | None) -> GainJob:
        """Queue a replay (options as :class:`~warmstart.service.models.GainBody`)."""
        job = GainJob(self.run_id + uuid.uuid4().hex[:8], owner, dict(options))
        with self._lock:
            self._jobs[job.job_id] = job
            self._order.append(job.job_id)
            finished = [j for j in self._order if self._jobs[j].state in ("done", "failed", "stopped")]
            for old in finished[:-MAX_KEPT]:
                self._order.remove(old)
                del self._jobs[old]
            if self._thread is None:
                self._thread = threading.Thread(target=self._run, name="warmstart-gain", daemon=True)
                self._thread.start()
        self._queue.put(job)
        return job

    def get(self, job_id: str) -> GainJob | None:
        with self._lock:
            return self._jobs.get(job_id)

    def lookup(self, job_id: str, view) -> dict | None:
        """A job's state as the API answers it, also for a job of an earlier run
        of the service (``view``: a read-only view of the archive); None when
        no run of this service gave that id.

        A job of this run is as it is now. A job of an earlier run whose
        replay finished reads ``done`` with its stored report; any other job
        of an earlier run reads ``failed``: that run stopped (a restart, a
        crash) before the replay finished, and its progress is lost.
        """
        job = self.get(job_id)
        if job is not None:
            return job.to_dict()
        rows = view.con.execute(
            "SELECT report_id, created_at, owner, options, result FROM gain_reports "
            "WHERE json_extract_string(options, '$.job') = ? ORDER BY report_id DESC LIMIT 1", [job_id]).fetchall()
        if rows:
            report_id, created_at, owner, options, result = rows[0]
            options = json.loads(options)
            options.pop("job", None)
            stamp = created_at.replace(microsecond=0).isoformat() + "Z"
            return {"job": job_id, "state": "done", "owner": owner, "options": options,
                    "progress": None, "created_at": None, "started_at": None, "finished_at": stamp,
                    "error": None, "report_id": int(report_id), "result": json.loads(result)}
        if job_id.startswith(self.run_id):
            return None
        return {"job": job_id, "state": "failed", "owner": None, "options": None, "progress": None,
                "created_at": None, "started_at": None, "finished_at": None, "report_id": None, "result": None,
                "error": f"the service run that took this replay stopped (a restart or a crash) before it finished; "
                         f"its progress is lost: start it again (this run of the service started at "
                         f"{self.started_at})"}

    def list(self) -> list[GainJob]:
        with self._lock:
            return [self._jobs[j] for j in reversed(self._order)]

    def close(self, timeout: float = 10.0) -> None:
        """Stop the running replay at its next step; drop queued ones."""
        self._stopping.set()
        self._queue.put(None)
        if self._thread is not None and self._thread.is_alive():
            self._thread.join(timeout)

    # -- the thread ----------------------------------------------------------------
    def _run(self) -> None:
        while True:
            job = self._queue.get()
            if job is None or self._stopping.is_set():
                if job is not None:
                    job.state = "stopped"
                if job is None:
                    return
                continue
            try:
                self._one(job)
            except BaseException as exc:  # never left "running": the job says what stopped it
                job.state, job.finished_at = "failed", _now_text()
                job.error = f"the replay stopped: {type(exc).__name__}: {exc}"
                if not isinstance(exc, Exception):
                    raise

    def _progress(self, job: GainJob):
        def progress(done: int, total: int, *_: Any) -> None:
            if self._stopping.is_set():
                raise _Stopped()
            job.done, job.total = int(done), int(total)
        return progress

    def _one(self, job: GainJob) -> None:
        from warmstart.gain.replay import leave_one_task_out

        job.state, job.started_at = "running", _now_text()
        view = self.service.new_view()
        o = job.options
        try:
            result = leave_one_task_out(
                view, o["learner"], budget=o["budget"], repeats=o["repeats"], gamma=o["gamma"], seed=o["seed"],
                workers=1, progress=self._progress(job), tasks=o.get("tasks"), objective=o["replay"],
            )
            body = gain_result_body(result)
        except _Stopped:
            job.state, job.error = "stopped", "the service shut down before the replay finished"
            return
        except Exception as exc:  # a replay that cannot run says why in the job
            job.state, job.error, job.finished_at = "failed", str(exc) or type(exc).__name__, _now_text()
            return
        finally:
            view.close()
        try:
            job.report_id = self._store(job, body)
        except Exception as exc:  # the result is still handed out; say it was not kept
            job.error = f"the result could not be stored in the archive: {exc}"
        job.result, job.state, job.finished_at = body, "done", _now_text()

    def _store(self, job: GainJob, body: dict) -> int:
        def write(archive) -> tuple[int, Any]:
            con = archive.con
            report_id = int(con.execute("SELECT nextval('gain_report_ids')").fetchall()[0][0])
            con.execute(
                "INSERT INTO gain_reports VALUES (?, ?, ?, ?, ?)",
                [report_id, datetime.now(timezone.utc).replace(tzinfo=None), job.owner,
                 json.dumps({**job.options, "job": job.job_id}, sort_keys=True), json.dumps(body, allow_nan=False)],
            )
            return 200, report_id

        deadline = time.monotonic() + 60
        future = self.service.writer.submit(write)
        return int(future.result(timeout=max(1.0, deadline - time.monotonic())).body)


def latest_report(archive) -> dict | None:
    """The latest stored gain report (options, owner, time and result), or None."""
    rows = archive.con.execute(
        "SELECT report_id, created_at, owner, options, result FROM gain_reports ORDER BY report_id DESC LIMIT 1"
    ).fetchall()
    if not rows:
        return None
    report_id, created_at, owner, options, result = rows[0]
    options = json.loads(options)
    job = options.pop("job", None)
    return {"report_id": int(report_id), "created_at": created_at.isoformat() + "Z", "owner": owner,
            "options": options, "job": job, "result": json.loads(result)}


__all__ += ["latest_report"]
