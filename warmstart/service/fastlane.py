"""The fast lane: propose and record, the two requests a training job sends
in a loop, answered without FastAPI's per-request machinery.

A pure ASGI middleware in front of the application. It takes a request only
when everything about it is ordinary: ``POST /api/v1/studies/<id>/propose``
or ``.../trials``, a JSON body with a declared length, a known token of the
write role (or no tokens at all), a well-formed ``Idempotency-Key`` if any,
and a body the same pydantic model accepts. It then runs the very write the
FastAPI route runs (:func:`propose_write`, :func:`record_write`) and answers
with the same status, headers and JSON text. Anything else -- a missing
token, bad JSON, a field out of range, a chunked body -- goes on to the
FastAPI route untouched (the body it read is handed on), so every refusal
keeps the one error shape and the OpenAPI description stays the routes'.

Why: under 32 clients the FastAPI route cost about 0.5 ms of the event
loop's time per request (dependency solving, routing, validation layers;
measured with py-spy, see ``docs/benchmarks.md``), as much as the search
that answers a proposal, and the event loop shares one core (the GIL) with
the writer.
"""

from __future__ import annotations

import hashlib
import json
import logging
import re
from dataclasses import dataclass
from typing import Any, Callable

from pydantic import ValidationError

from warmstart.errors import WarmstartError
from warmstart.service.auth import ANONYMOUS, Principal, Tokens
from warmstart.service.core import Service
from warmstart.service.errors import ServiceError, error_body
from warmstart.service.models import ProposeBody, RecordBody
from warmstart.service.writer import Answer, RequestKey

__all__ = ["FastLane", "LaneCounts", "propose_write", "record_write", "REQUEST_ID", "MAX_STUDY_ID"]

log = logging.getLogger("warmstart.service")
REQUEST_ID = re.compile(r"^[A-Za-z0-9_.:-]{1,128}$")
MAX_STUDY_ID = 2**62
_PATH = re.compile(r"^/api/v1/studies/([1-9][0-9]{0,18})/(propose|trials)$")


def propose_write(service: Service, study_id: int, body: ProposeBody, who: Principal) -> Callable:
    """The write of ``POST /studies/{id}/propose`` (run by the writer)."""
    return lambda archive: (200, service.leases.propose(archive, study_id, body.k, body.lease_seconds, who.name))


def record_write(service: Service, study_id: int, body: RecordBody, who: Principal) -> Callable:
    """The write of ``POST /studies/{id}/trials`` (run by the writer, before the proposals of its batch)."""
    return lambda archive: (200, service.leases.record(archive, study_id, body.trial, body.config, body.score,
                                                       body.status, body.error, body.cost_s, who.name))


def answer_headers(result: Answer) -> dict[str, str] | None:
    """Extra headers of a write's answer (a replayed one says so)."""
    return {"Idempotent-Replayed": "true"} if result.replayed else None


@dataclass
class LaneCounts:
    """Requests the fast lane answered itself (``taken``); the others went on to the routes."""

    taken: int = 0


class FastLane:
    """ASGI middleware that answers ordinary propose and record requests itself.

    Parameters
    ----------
    app : ASGI application
        What every other request goes to (the FastAPI app's inner stack).
    service : Service
    tokens : Tokens or None
        The team's tokens (None: every request is the anonymous admin).
    counts : LaneCounts, optional
        Where the lane counts the requests it answered itself.
    """

    def __init__(self, app, service: Service, tokens: Tokens | None, counts: "LaneCounts | None" = None):
        self.app = app
        self.service = service
        self.tokens = tokens
        self.counts = counts if counts is not None else LaneCounts()

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http" or scope["method"] != "POST":
            return await self.app(scope, receive, send)
        match = _PATH.match(scope.get("path", ""))
        if match is None:
            return await self.app(scope, receive, send)
        headers = dict(scope.get("headers") or [])
        declared = headers.get(b"content-length")
        content_type = headers.get(b"content-type", b"").split(b";")[0].strip().lower()
        who = self._principal(headers)
        key_text = headers.get(b"idempotency-key")
        if (declared is None or content_type != b"application/json" or who is None
                or (key_text is not None and not REQUEST_ID.match(key_text.decode("latin-1")))):
            return await self.app(scope, receive, send)
        body, more = await _read_body(receive)
        parsed = None if more is None else self._parse(match, body)
        if parsed is None:  # not ordinary: the route answers (its refusals have the one error shape)
            return await self.app(scope, _replay(body, more, receive), send)
        study_id, model, kind = parsed
        self.counts.taken += 1
        key = None
        if key_text is not None:
            key = RequestKey(who.key, key_text.decode("latin-1"), f"POST {scope['path']}",
                             hashlib.sha256(body).hexdigest())
        if who.name is not None:
            scope.setdefault("state", {})["principal"] = who.name  # for the request log line
        if kind == "propose":
            write, early = propose_write(self.service, study_id, model, who), False
        else:
            write, early = record_write(self.service, study_id, model, who), True
        try:
            result = await self.service.write(write, key, early=early)
        except ServiceError as exc:
            extra = exc.headers or ({"WWW-Authenticate": "Bearer"} if exc.status == 401 else None)
            return await _send(send, exc.status, _json(error_body(exc.message, exc.field, exc.value)), extra)
        except WarmstartError as exc:  # a library refusal without a field: the client's input
            return await _send(send, 422, _json(error_body(str(exc), "body")), None)
        except Exception as exc:
            log.error("internal error on %s %s", scope["method"], scope["path"], exc_info=exc)
            return await _send(send, 500, _json(error_body(
                "internal error of the service; the server log has the details")), None)
        await _send(send, result.status, result.text.encode("utf-8"), answer_headers(result))

    def _principal(self, headers: dict) -> Principal | None:
        """The writer behind the request, or None when the route should decide."""
        if self.tokens is None:
            return ANONYMOUS
        scheme, _, credential = headers.get(b"authorization", b"").decode("latin-1").partition(" ")
        credential = credential.strip()
        if scheme.lower() != "bearer" or not credential:
            return None
        who = self.tokens.identify(credential)
        return who if who is not None and who.may("write") else None

    @staticmethod
    def _parse(match: re.Match, body: bytes) -> tuple[int, Any, str] | None:
        study_id = int(match.group(1))
        if study_id > MAX_STUDY_ID:
            return None
        model = ProposeBody if match.group(2) == "propose" else RecordBody
        try:
            data = json.loads(body)
            return study_id, model.model_validate(data), match.group(2)
        except (ValueError, ValidationError):  # bad JSON (ValueError) or a field the model refuses
            return None


async def _read_body(receive) -> tuple[bytes, bool | None]:
    """The whole body, and whether the client is still there (None: it left)."""
    chunks = []
    while True:
        message = await receive()
        if message["type"] != "http.request":
            return b"".join(chunks), None
        chunks.append(message.get("body", b""))
        if not message.get("more_body", False):
            return b"".join(chunks), False


def _replay(body: bytes, gone: bool | None, receive):
    """A receive that hands on the body read already, then the client's own."""
    sent = False

    async def again():
        nonlocal sent
        if not sent and gone is not None:
            sent = True
            return {"type": "http.request", "body": body, "more_body": False}
        return await receive()

    return again


def _json(body: dict) -> bytes:
    # as starlette.responses.JSONResponse.render writes it
    return json.dumps(body, ensure_ascii=False, allow_nan=False, indent=None, separators=(",", ":")).encode("utf-8")


async def _send(send, status: int, payload: bytes, extra: dict[str, str] | None) -> None:
    headers = [(b"content-length", str(len(payload)).encode("latin-1")), (b"content-type", b"application/json")]
    for name, value in (extra or {}).items():
        headers.append((name.lower().encode("latin-1"), value.encode("latin-1")))
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": payload})
