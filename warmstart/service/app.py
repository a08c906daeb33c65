"""The ASGI application: FastAPI (on Starlette) with the API, the page,
tokens, one log line per request and a clean start and stop.

Start it with ``warmstart serve`` (uvicorn), or in a test with FastAPI's
in-process test client::

    with TestClient(create_app(Archive(path))) as client:
        client.get("/api/v1/studies")
"""

from __future__ import annotations

import base64
import contextlib
import logging
import time
import uuid

from fastapi import FastAPI, Request

from warmstart.archive.store import Archive
from warmstart.service.api import INGEST_MAX_BYTES, api_router
from warmstart.service.auth import ANONYMOUS, Principal, Tokens
from warmstart.service.core import Service
from warmstart.service.errors import ServiceError, install_handlers
from warmstart.service.fastlane import FastLane, LaneCounts
from warmstart.service.leases import DEFAULT_LEASE_SECONDS
from warmstart.service.page import page_router

__all__ = ["create_app", "MAX_BODY_BYTES", "OPENAPI_URL"]

log = logging.getLogger("warmstart.service")
MAX_BODY_BYTES = 1024 * 1024  # every request but ingest
OPENAPI_URL = "/api/v1/openapi.json"


def _authorizer(tokens: Tokens | None):
    """``authorize(role)``: a dependency that finds who sends a request and
    refuses a missing or unknown token (401) or a role too weak (403)."""

    def authorize(role: str):
        # async on purpose: FastAPI runs a plain function dependency in its thread pool, a
        # thread hop per request for a check that reads one header (measured: ~6% of the
        # event loop's time under 32 clients)
        async def dependency(request: Request) -> Principal:
            who = identify(request, tokens)
            if not who.may(role):
                raise ServiceError(403, f"{who.name!r} has the {who.role} role; this needs {role}", "Authorization")
            return who

        dependency.__name__ = f"needs_{role}"
        return dependency

    return authorize


def identify(request: Request, tokens: Tokens | None, basic: bool = False) -> Principal:
    """The principal of a request (``Authorization: Bearer`` or, for the page, Basic)."""
    if tokens is None:
        return ANONYMOUS
    header = request.headers.get("authorization")
    challenge = {"WWW-Authenticate": 'Basic realm="warmstart"'} if basic else None
    if not header:
        raise ServiceError(401, "this service needs a token: send the header Authorization: Bearer <token>",
                           "Authorization", headers=challenge)
    scheme, _, credential = header.partition(" ")
    credential = credential.strip()
    who = None
    if scheme.lower() == "bearer" and credential:
        who = tokens.identify(credential)
    elif scheme.lower() == "basic" and credential:
        try:
            name, _, token = base64.b64decode(credential, validate=True).decode("utf-8").partition(":")
        except (ValueError, UnicodeDecodeError):
            name, token = "", ""
        found = tokens.identify(token) if token else None
        who = found if found is not None and found.name == name else None
    else:
        raise ServiceError(401, "Authorization must be 'Bearer <token>'", "Authorization", headers=challenge)
    if who is None:
        raise ServiceError(401, "unknown token; ask the service's admin for yours", "Authorization",
                           headers=challenge)
    request.state.principal = who.name
    return who


class _BodyLimit:
    """Pure ASGI middleware: refuse a body over the limit with a JSON 413.

    A declared ``Content-Length`` over the limit is refused before anything
    is read; a body sent in chunks is counted as it arrives and refused when
    it passes the limit (raised inside the app, so the one error shape
    applies). ``POST /api/v1/ingest`` has its own, larger limit.
    """

    def __init__(self, app, limit: int, larger: dict[str, int]):
        self.app = app
        self.limit = limit
        self.larger = larger

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        limit = self.larger.get(scope.get("path", ""), self.limit)
        declared = dict(scope.get("headers") or []).get(b"content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > limit):
            from fastapi.responses import JSONResponse

            from warmstart.service.errors import error_body

            response = JSONResponse(error_body(
                f"the body is {declared.decode('latin-1')[:20]} bytes; at most {limit} are taken here",
                "body", None), status_code=413)
            return await response(scope, receive, send)
        seen = 0

        async def counted():
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise ServiceError(413, f"the body passed {limit} bytes, the most taken here", "body")
            return message

        await self.app(scope, counted, send)


class _RequestLog:
    """Pure ASGI middleware: one log line per request, no secrets.

    The line has the client address, method, path (never the query string
    or headers), status, duration, the token's name and the request id the
    client sent, if any.
    """

    def __init__(self, app):
        self.app = app

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        start = time.perf_counter()
        status = {"code": 500}

        async def send_and_note(message):
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_and_note)
        finally:
            headers = dict(scope.get("headers") or [])
            request_id = headers.get(b"idempotency-key", b"").decode("latin-1")[:128]
            who = (scope.get("state") or {}).get("principal") or "-"
            client = scope.get("client") or ("-", 0)
            path = "".join(c if c.isprintable() else "?" for c in scope.get("path", ""))[:300]
            log.info("%s %s %s %d %.1fms who=%s request_id=%s", client[0], scope["method"], path, status["code"],
                     (time.perf_counter() - start) * 1000, who, "".join(c for c in request_id if c.isprintable())
                     or "-")


def create_app(archive: Archive | str, tokens: Tokens | None = None,
               lease_seconds: float = DEFAULT_LEASE_SECONDS, search_process: bool | int = False,
               fast_lane: bool = True) -> FastAPI:
    """The service's ASGI app over one archive.

    Parameters
    ----------
    archive : Archive or str
        The archive, opened for writing (a path is opened here). The app
        owns it from now on and closes it when it stops.
    tokens : Tokens, optional
        The team's tokens; None lets every request in (loopback use only).
    lease_seconds : float, default 3600
        Life of a lease when a proposal asks for none.
    search_process : bool or int, default False
        Run the studies' searches in a child process, or spread over that
        many (see :class:`~warmstart.service.core.Service`).
    fast_lane : bool, default True
        Answer ordinary propose and record requests in
        :class:`~warmstart.service.fastlane.FastLane` (same answers, a
        fraction of the work); False sends them through their FastAPI routes.
    """
    if not isinstance(archive, Archive):
        archive = Archive(archive)
    service = Service(archive, tokens=tokens, lease_seconds=lease_seconds, search_process=search_process)

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI):
        service.start()
        log.info("serving %s (%s)", archive.path,
                 f"{len(tokens)} token(s)" if tokens is not None else "no tokens")
        try:
            yield
        finally:
            service.close()
            log.info("stopped; the archive is closed")

    from warmstart import __version__

    app = FastAPI(
        title="warmstart team service",
        version=__version__,
        description="One process owns a warmstart archive; training jobs and teammates propose, record and "
                    "query over HTTP. Writes: one writer, answered after commit; send Idempotency-Key to retry "
                    "safely. Errors: {error, field, value}.",
        openapi_url=OPENAPI_URL,
        docs_url=None,  # the interactive pages load scripts from the internet; the description is the JSON
        redoc_url=None,
        lifespan=lifespan,
        telemetry={"tracing": False, "metrics": False, "logs": False, "operation_spans": False,
                   "auto_configure": False},
    )
    app.state.service = service
    install_handlers(app)
    authorize = _authorizer(tokens)
    app.include_router(api_router(service, authorize))
    app.include_router(page_router(service, lambda request: identify(request, tokens, basic=True)))
    if fast_lane:  # innermost of ours: inside the body limit and the request log
        app.state.fast_lane = LaneCounts()
        app.add_middleware(FastLane, service=service, tokens=tokens, counts=app.state.fast_lane)
    app.add_middleware(_BodyLimit, limit=MAX_BODY_BYTES, larger={"/api/v1/ingest": INGEST_MAX_BYTES})
    app.add_middleware(_RequestLog)
    return app


def new_request_id() -> str:
    """A fresh client request id (what :class:`~warmstart.client.Client` sends)."""
    return uuid.uuid4().hex
