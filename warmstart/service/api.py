"""The JSON API under ``/api/v1``: the archive's verbs over HTTP.

Reads run in the server's thread pool, each thread on its own read-only
view; writes go to the one writer and are answered after their commit. A
write may carry ``Idempotency-Key: <request id>`` (1-128 letters, digits and
``_.:-``): a retry with the same id gets the first answer and writes nothing.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import tempfile
from pathlib import Path
from typing import Annotated, Any

import pandas as pd
from fastapi import APIRouter, Depends, Header, Query, Request
from fastapi import Path as PathParam
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, Response
from starlette.background import BackgroundTask

from warmstart.errors import ArchiveError, IngestError, ProfileError, SpaceError, WarmstartError
from warmstart.service.auth import Principal
from warmstart.service.core import Service, jsonable
from warmstart.service.errors import ServiceError
from warmstart.service.fastlane import MAX_STUDY_ID, REQUEST_ID, answer_headers, propose_write, record_write
from warmstart.service.models import (
    NewStudyBody, DefaultsBody, GainBody, IngestBody, NeighborsBody, PriorBody, ProposeBody, RecordBody, TagBody,
    TaskInfo,
)
from warmstart.service.writer import Answer, RequestKey
from warmstart.space import Space

__all__ = ["api_router", "INGEST_MAX_BYTES", "study_curve"]

INGEST_MAX_BYTES = 32 * 1024 * 1024
STUDY_ORDER = {"study_id": "study_id", "best_score": "best_score", "created_at": "created_at",
               "trial_count": "trial_count"}  # allow-list of sort keys (no user text reaches a query)
StudyId = Annotated[int, PathParam(ge=1, le=MAX_STUDY_ID, description="study id")]


def api_router(service: Service, authorize) -> APIRouter:
    """The API's routes over ``service``; ``authorize(role)`` gives the
    dependency that checks a request's token for ``role``."""
    router = APIRouter(prefix="/api/v1")
    roles = (authorize("read"), authorize("write"), authorize("admin"))
    request_key = _request_key(roles[1])
    _read_routes(router, service, roles)
    _study_write_routes(router, service, roles, request_key)
    _tag_and_ingest_routes(router, service, roles, request_key)
    _query_routes(router, service, roles)
    _admin_and_gain_routes(router, service, roles)
    return router


def _request_key(writers):
    """The dependency that reads a write's ``Idempotency-Key`` (None without one)."""

    async def request_key(request: Request, who: Principal = Depends(writers),
                          idempotency_key: Annotated[str | None, Header()] = None) -> RequestKey | None:
        if idempotency_key is None:
            return None
        if not REQUEST_ID.match(idempotency_key):
            raise ServiceError(422, "Idempotency-Key must be 1-128 letters, digits or _.:- (e.g. a UUID)",
                               "Idempotency-Key", idempotency_key)
        body = await request.body()
        return RequestKey(who.key, idempotency_key, f"{request.method} {request.url.path}",
                          hashlib.sha256(body).hexdigest())

    return request_key


def _answer(result: Answer) -> Response:
    # the JSON text the writer made (and stored for a retry) goes out as it is: no second encoding
    return Response(result.text, status_code=result.status, headers=answer_headers(result),
                    media_type="application/json")


def _read_routes(router: APIRouter, service: Service, roles: tuple) -> None:
    """The routes of health, studies, a study, its trials and leases."""
    readers = roles[0]
    # -- health ------------------------------------------------------------------
    @router.get("/health", summary="Is the service up; which archive it serves")
    def health(who: Principal = Depends(readers)) -> dict:
        from warmstart import __version__

        view = service.reader()
        return {"status": "ok", "archive": service.archive.path, "schema_version": view.schema_version,
                "warmstart": __version__, "writes_waiting": service.writer.backlog,
                "tokens": service.tokens is not None, "you": who.name, "role": who.role}

    # -- studies -------------------------------------------------------------------
    @router.get("/studies", summary="List studies, filtered")
    def studies(
        who: Principal = Depends(readers),
        learner: Annotated[str | None, Query(max_length=200)] = None,
        task: Annotated[str | None, Query(max_length=200)] = None,
        owner: Annotated[str | None, Query(max_length=200)] = None,
        tag: Annotated[list[str], Query(max_length=50, description="KEY=VALUE, repeatable; all must match")] = [],
        order: Annotated[str, Query(description=f"one of {', '.join(STUDY_ORDER)}")] = "study_id",
        limit: Annotated[int, Query(ge=1, le=100_000)] = 10_000,
    ) -> list[dict]:
        if order not in STUDY_ORDER:
            raise ServiceError(422, f"order must be one of {', '.join(STUDY_ORDER)}", "order", order)
        frame = filter_studies(service.reader().studies(), learner=learner, task=task, owner=owner,
                               tags=parse_tags(tag))
        frame = frame.sort_values(STUDY_ORDER[order], ascending=order == "study_id", na_position="last")
        return jsonable(frame.head(limit).to_dict(orient="records"))

    @router.get("/studies/{study_id}", summary="One study: space, best trials, best-so-far curve")
    def show(study_id: StudyId, who: Principal = Depends(readers),
             top: Annotated[int, Query(ge=0, le=100_000)] = 10) -> dict:
        view = service.reader()
        row = study_or_404(view, study_id)
        table = view.trial_table(study_id)
        info = {k: v for k, v in row.items() if k != "space"}
        info["space"] = row["space"].to_dict()
        ok = table[table["status"] == "ok"].sort_values("score", ascending=not row["maximize"])
        if top:
            ok = ok.head(top)
        info["best_trials"] = ok.drop(columns=["content_key"]).to_dict(orient="records")
        info["curve"] = study_curve(table, row["maximize"])
        return jsonable(info)

    @router.get("/studies/{study_id}/trials", summary="Every trial of a study")
    def trials(study_id: StudyId, who: Principal = Depends(readers)) -> list[dict]:
        view = service.reader()
        study_or_404(view, study_id)
        return jsonable(view.trials(study_id).to_dict(orient="records"))

    @router.get("/studies/{study_id}/leases", summary="Leases of a study (pending ones by default)")
    def leases(study_id: StudyId, who: Principal = Depends(readers),
               state: Annotated[str, Query(pattern="^(pending|recorded|expired|all)$")] = "pending") -> list[dict]:
        view = service.reader()
        study_or_404(view, study_id)
        frame = view.con.execute(
            "SELECT trial_id AS trial, config, owner, created_at, expires_at, state, number, status, score "
            "FROM leases WHERE study_id = ? AND (? = 'all' OR state = ?) ORDER BY trial_id",
            [study_id, state, state],
        ).df()
        frame["config"] = [json.loads(c) for c in frame["config"]]
        return jsonable(frame.to_dict(orient="records"))


def _study_write_routes(router: APIRouter, service: Service, roles: tuple, request_key) -> None:
    """The routes of create a study, propose, record, finish."""
    writers = roles[1]
    @router.post("/studies", status_code=201, summary="Create a study of a task described by the client")
    async def new_study(body: NewStudyBody, who: Principal = Depends(writers),
                           key: RequestKey | None = Depends(request_key)) -> Response:
        owner = owner_of(who, body.owner)
        check_task(body.task)
        space = space_of(body.space, body.learner, body.task.kind)
        maximize = direction_of(body.metric, body.maximize)
        same = await run_in_threadpool(lambda: same_data(service.reader(), body.task.fingerprint))

        def start():
            from warmstart.service.searches import start_search

            return service.query(lambda view: start_search(
                view, body.task.profile, same, body.learner, space, maximize, seed=0, cold=body.cold,
                n_seeds=body.n_seeds))

        search, origin, provenance, note = await run_in_threadpool(start)

        def write(archive) -> tuple[int, Any]:
            task_id = register(archive, body.task)
            study = archive.add_study(task_id, body.learner, space, metric=body.metric, maximize=maximize,
                                      origin=origin, prior=provenance, owner=owner, tags=body.tags)
            service.leases.adopt(study, search)
            return 201, {"study_id": study, "task_id": task_id, "origin": origin, "note": note,
                         "metric": body.metric, "direction": "maximize" if maximize else "minimize",
                         "owner": owner}

        return _answer(await service.write(write, key))

    @router.post("/studies/{study_id}/propose", summary="Lease k distinct configs to evaluate")
    async def propose(study_id: StudyId, body: ProposeBody, who: Principal = Depends(writers),
                      key: RequestKey | None = Depends(request_key)) -> Response:
        return _answer(await service.write(propose_write(service, study_id, body, who), key))

    @router.post("/studies/{study_id}/trials", summary="Record a result (by lease, or a config never proposed)")
    async def record(study_id: StudyId, body: RecordBody, who: Principal = Depends(writers),
                     key: RequestKey | None = Depends(request_key)) -> Response:
        return _answer(await service.write(record_write(service, study_id, body, who), key, early=True))

    @router.post("/studies/{study_id}/finish", summary="Mark a study finished")
    async def finish(study_id: StudyId, who: Principal = Depends(writers),
                     key: RequestKey | None = Depends(request_key)) -> Response:
        def write(archive) -> tuple[int, Any]:
            study_or_404(archive, study_id)
            archive.finish_study(study_id)
            return 200, {"study_id": study_id, "finished": True}

        return _answer(await service.write(write, key))


def _tag_and_ingest_routes(router: APIRouter, service: Service, roles: tuple, request_key) -> None:
    """The routes of tags and owner, ingest of past trials."""
    writers = roles[1]
    @router.post("/studies/{study_id}/tags", summary="Set or remove tags (and, as admin, the owner)")
    async def tag(study_id: StudyId, body: TagBody, who: Principal = Depends(writers),
                  key: RequestKey | None = Depends(request_key)) -> Response:
        if body.owner is not None and not who.may("admin"):
            raise ServiceError(403, "changing a study's owner needs the admin role", "owner", body.owner)

        def write(archive) -> tuple[int, Any]:
            from warmstart.archive.labels import label_study

            study_or_404(archive, study_id)
            try:
                done = label_study(archive, study_id, tags=body.set, owner=body.owner, remove=body.remove)
            except ArchiveError as exc:
                raise ServiceError(422, str(exc), "remove", body.remove) from None
            return 200, done

        return _answer(await service.write(write, key))

    @router.post("/ingest", status_code=201, summary="Add past trials of a task as a new study "
                 f"(body up to {INGEST_MAX_BYTES // 2**20} MiB)")
    async def ingest(body: IngestBody, who: Principal = Depends(writers),
                     key: RequestKey | None = Depends(request_key)) -> Response:
        from warmstart.archive.ingest import prepare_trials

        owner = owner_of(who, body.owner)
        check_task(body.task)
        space = space_of(body.space, body.learner, body.task.kind)
        maximize = direction_of(body.metric, body.maximize)
        frame = pd.DataFrame(body.trials)
        try:  # checked before the writer is bothered; the writer checks again as it inserts
            await run_in_threadpool(prepare_trials, space, frame, "trials", body.metric)
        except (IngestError, SpaceError, WarmstartError) as exc:
            raise ServiceError(422, str(exc), "trials") from None

        def write(archive) -> tuple[int, Any]:
            from warmstart.archive.curate import copies_elsewhere

            task_id = register(archive, body.task)
            study = archive.add_study(task_id, body.learner, space, metric=body.metric, maximize=maximize,
                                      origin="imported", owner=owner, tags=body.tags)
            try:
                n = archive.add_trials(study, frame, where="trials")
            except WarmstartError as exc:
                raise ServiceError(422, str(exc), "trials") from None
            archive.finish_study(study)
            row = archive.study(study)
            copies, others = copies_elsewhere(archive, study)
            return 201, jsonable({
                "task_id": task_id, "study_id": study, "trials": n, "failed": int(row["trial_count"] - row["n_ok"]),
                "best_score": row["best_score"], "owner": owner,
                "copies": copies, "copies_of_studies": others[:20],
            })

        return _answer(await service.write(write, key))


def _query_routes(router: APIRouter, service: Service, roles: tuple) -> None:
    """The routes of neighbors, defaults, prior."""
    readers = roles[0]
    # -- what the history says about a task ----------------------------------------------
    @router.post("/neighbors", summary="Past tasks ranked by similarity to a profile")
    def neighbors(body: NeighborsBody, who: Principal = Depends(readers)) -> dict:
        if body.learner is not None:
            check_learner(service.reader(), body.learner)
        try:
            frame = service.query(lambda view: view.neighbors(body.profile, learner=body.learner, k=body.k))
        except (ArchiveError, ProfileError) as exc:
            raise ServiceError(422, str(exc), "profile") from None
        return {"neighbors": jsonable(frame.to_dict(orient="records")), "notes": frame.attrs.get("notes", [])}

    @router.get("/tasks/{task_id}/neighbors", summary="Neighbors of a task in the archive (by its stored profile)")
    def task_neighbors(task_id: Annotated[int, PathParam(ge=1, le=2**62)], who: Principal = Depends(readers),
                       learner: Annotated[str | None, Query(max_length=200)] = None,
                       k: Annotated[int, Query(ge=1, le=1000)] = 10) -> dict:
        return task_neighbors_body(service, task_id, learner, k)

    @router.post("/defaults", summary="Configs that did well across many past tasks")
    def defaults(body: DefaultsBody, who: Principal = Depends(readers)) -> dict:
        check_learner(service.reader(), body.learner)
        try:
            frame = service.query(lambda view: view.defaults(body.learner, near=body.near, n=body.n, kind=body.kind))
        except (ArchiveError, ProfileError) as exc:
            raise ServiceError(422, str(exc), "near") from None
        return {"defaults": jsonable(frame.to_dict(orient="records")), "notes": frame.attrs.get("notes", [])}

    @router.post("/prior", summary="The prior a new study of this task would start from")
    def prior(body: PriorBody, who: Principal = Depends(readers)) -> dict:
        from warmstart.prior import PriorError
        from warmstart.profile import profile_kind

        view = service.reader()
        check_learner(view, body.learner)
        kind = body.kind or profile_kind(body.profile)
        space = space_of(body.space, body.learner, kind)
        exclude = same_data(view, body.exclude_fingerprint) if body.exclude_fingerprint else []
        try:
            built = service.query(lambda v: v.build_prior(body.profile, learner=body.learner, space=space,
                                                           exclude_tasks=exclude, n_seeds=body.n_seeds))
        except (PriorError, ArchiveError, ProfileError) as exc:
            raise ServiceError(422, str(exc), "profile") from None
        return jsonable({"provenance": built.provenance, "seeds": built.seeds, "summary": built.summary(n=8),
                         "space": space.to_dict(), "excluded_tasks": exclude})


def _admin_and_gain_routes(router: APIRouter, service: Service, roles: tuple) -> None:
    """The routes of curation (admin) and gain replays."""
    readers, writers, admins = roles
    # -- curation (admin) -----------------------------------------------------------------
    @router.get("/curate/check", summary="Integrity report of the archive (admin)")
    def check(who: Principal = Depends(admins)) -> dict:
        from warmstart.archive.curate import check_archive

        report = check_archive(service.reader())
        return jsonable({"ok": report.ok, "findings": report.to_frame().to_dict(orient="records")})

    @router.get("/curate/export", summary="The archive as a Parquet store, zipped (admin)",
                response_class=FileResponse)
    def export(who: Principal = Depends(admins)) -> FileResponse:
        from warmstart.archive.exchange import export_archive

        scratch = Path(tempfile.mkdtemp(prefix="warmstart-export-"))
        try:
            manifest = export_archive(service.reader(), scratch / "store")
            zipped = shutil.make_archive(str(scratch / "warmstart-export"), "zip", root_dir=scratch / "store")
        except BaseException:
            shutil.rmtree(scratch, ignore_errors=True)
            raise
        name = f"warmstart-export-{manifest.get('archive_id', 'archive')[:8]}.zip"
        return FileResponse(zipped, media_type="application/zip", filename=name,
                            background=BackgroundTask(shutil.rmtree, scratch, ignore_errors=True))

    # -- gain replays (background jobs) -------------------------------------------------------
    @router.post("/gain", status_code=202, summary="Start a leave-one-task-out gain replay in the background")
    def gain(body: GainBody, who: Principal = Depends(writers)) -> dict:
        check_learner(service.reader(), body.learner)
        job = service.jobs.submit(body.model_dump(), who.name)
        return {**job.to_dict(with_result=False), "url": f"/api/v1/gain/jobs/{job.job_id}"}

    @router.get("/gain/jobs", summary="Gain replays of this server run, newest first")
    def gain_jobs(who: Principal = Depends(readers)) -> list[dict]:
        return [j.to_dict(with_result=False) for j in service.jobs.list()]

    @router.get("/gain/jobs/{job_id}", summary="A gain replay's state, progress and (when done) result")
    def gain_job(job_id: Annotated[str, PathParam(pattern=r"^[0-9a-f]{16}$")],
                 who: Principal = Depends(readers)) -> dict:
        state = service.jobs.lookup(job_id, service.reader())
        if state is None:
            raise ServiceError(404, f"no gain job {job_id} on this server (POST /api/v1/gain starts one; "
                               "finished reports: GET /api/v1/gain/latest)", "job_id", job_id)
        return state

    @router.get("/gain/latest", summary="The latest finished gain report")
    def gain_latest(who: Principal = Depends(readers)) -> dict:
        from warmstart.service.jobs import latest_report

        report = latest_report(service.reader())
        if report is None:
            raise ServiceError(404, "no gain report yet; POST /api/v1/gain starts one", "path")
        return report


# -- helpers shared with the page ---------------------------------------------------------
def study_or_404(archive, study_id: int) -> dict:
    """The study as :meth:`Archive.study` gives it, or a 404 naming it."""
    if not archive.con.execute("SELECT 1 FROM studies WHERE study_id = ?", [study_id]).fetchall():
        raise ServiceError(404, f"no study with id {study_id}; GET /api/v1/studies lists them", "study_id", study_id)
    return archive.study(study_id)


def study_curve(table: pd.DataFrame, maximize: bool) -> list[dict]:
    """Best score so far after each trial (failed trials keep the best), in trial order."""
    out, best = [], None
    for number, score, status in zip(table["number"], table["score"], table["status"]):
        if status == "ok" and score is not None and score == score:
            score = float(score)
            if best is None or (score > best if maximize else score < best):
                best = score
        out.append({"number": int(number), "score": None if status != "ok" else float(score), "best": best})
    return out


def task_neighbors_body(service: Service, task_id: int, learner: str | None, k: int) -> dict:
    """Neighbors of an archived task by its stored profile (itself left out)."""
    view = service.reader()
    rows = view.con.execute("SELECT name FROM tasks WHERE task_id = ?", [task_id]).fetchall()
    if not rows:
        raise ServiceError(404, f"no task with id {task_id}", "task_id", task_id)
    if learner is not None:
        check_learner(view, learner)
    try:
        prof = view.profile_of(task_id)
        frame = service.query(lambda v: v.neighbors(prof, learner=learner, k=k + 1))
    except (ArchiveError, ProfileError) as exc:
        raise ServiceError(422, str(exc), "task_id", task_id) from None
    frame = frame[frame["task_id"] != task_id].head(k)
    return {"task_id": task_id, "task": rows[0][0], "neighbors": jsonable(frame.to_dict(orient="records")),
            "notes": frame.attrs.get("notes", [])}


def filter_studies(frame: pd.DataFrame, **filters) -> pd.DataFrame:
    from warmstart.archive.labels import filter_studies as by_labels

    return by_labels(frame, **filters)


def parse_tags(items: list[str]) -> dict[str, str]:
    tags = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise ServiceError(422, f"tag filters are KEY=VALUE, e.g. team=retention; got {item!r}", "tag", item)
        tags[key] = value
    return tags


def check_learner(view, learner: str) -> None:
    known = [r[0] for r in view.con.execute("SELECT DISTINCT learner FROM studies ORDER BY 1").fetchall()]
    if learner not in known:
        listed = ", ".join(known) if known else "none yet"
        raise ServiceError(422, f"no studies of learner {learner!r}; learners with studies: {listed}",
                           "learner", learner)


def owner_of(who: Principal, asked: str | None) -> str | None:
    """The owner of what a request creates: the token's name; without tokens, what the body says."""
    if who.name is None:
        return asked
    if asked is not None and asked != who.name:
        raise ServiceError(403, f"with tokens the owner is the token's name ({who.name!r}); leave owner out",
                           "owner", asked)
    return who.name


def check_task(task: TaskInfo) -> None:
    from warmstart.profile import FEATURE_GROUPS, PROFILE_VERSION, profile_kind

    if task.profile_version != PROFILE_VERSION:
        raise ServiceError(422, f"profile version {task.profile_version!r} is not this archive's "
                           f"({PROFILE_VERSION!r}); compute the profile with the same warmstart version as the "
                           "server", "task.profile_version", task.profile_version)
    unknown = sorted(set(task.profile) - set(FEATURE_GROUPS))
    if unknown:
        raise ServiceError(422, f"unknown meta-feature(s) {unknown[:5]}; a profile holds names such as "
                           f"{', '.join(list(FEATURE_GROUPS)[:4])} ...", "task.profile", unknown[:5])
    if profile_kind(task.profile) != task.kind:
        raise ServiceError(422, f"the profile describes a {profile_kind(task.profile)} task, not {task.kind}",
                           "task.kind", task.kind)


def space_of(definition: dict | None, learner: str, kind: str) -> Space:
    from warmstart.evaluate.learners import LEARNERS, default_space

    if definition is None:
        if learner not in LEARNERS:
            raise ServiceError(422, f"learner {learner!r} is not built-in; send its space "
                               f"(built-in: {', '.join(sorted(LEARNERS))})", "space", None)
        return default_space(learner, kind)
    try:
        return Space.from_dict(definition, where="space")
    except (SpaceError, WarmstartError) as exc:
        raise ServiceError(422, str(exc), "space", definition) from None
    except (TypeError, ValueError, AttributeError) as exc:
        raise ServiceError(422, f"space is not a space definition ({exc}); send {{'params': {{name: {{...}}}}}}",
                           "space", definition) from None


def direction_of(metric: str, maximize: bool | None) -> bool:
    from warmstart.archive.ingest import study_direction

    try:
        return study_direction(metric, None if maximize is None else not maximize)
    except WarmstartError as exc:
        raise ServiceError(422, str(exc), "maximize", maximize) from None


def same_data(view, fingerprint: str) -> list[int]:
    return [int(r[0]) for r in view.con.execute(
        "SELECT task_id FROM tasks WHERE fingerprint = ? ORDER BY task_id", [fingerprint]).fetchall()]


def register(archive, task: TaskInfo) -> int:
    try:
        return archive.register_task(task.name, task.fingerprint, task.kind, task.target, task.n_rows,
                                     task.n_features, task.profile, source=task.source)
    except ArchiveError as exc:
        raise ServiceError(409, str(exc), "task.name", task.name) from None
