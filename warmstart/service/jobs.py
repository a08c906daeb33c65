"""Gain replays as background jobs: started by a request, run one at a time
in a thread of their own on a read-only view, with progress to poll and a
result to fetch. A finished replay is stored in the archive (table
``gain_reports``, through the writer) so the web page shows the latest one
after a restart too; the jobs themselves live in memory.
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
        self._jobs: dict[str, GainJob] = {}
        self._order: list[str] = []
        self._lock = threading.Lock()
        self._queue: queue.Queue[GainJob | None] = queue.Queue()
        self._thread: threading.Thread | None = None
        self._stopping = threading.Event()

    def submit(self, options: dict, owner: str | None) -> GainJob:
        """Queue a replay (options as :class:`~warmstart.service.models.GainBody`)."""
        job = GainJob(uuid.uuid4().hex[:16], owner, dict(options))
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
            self._one(job)

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
                 json.dumps(job.options, sort_keys=True), json.dumps(body, allow_nan=False)],
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
    return {"report_id": int(report_id), "created_at": created_at.isoformat() + "Z", "owner": owner,
            "options": json.loads(options), "result": json.loads(result)}


__all__ += ["latest_report"]
