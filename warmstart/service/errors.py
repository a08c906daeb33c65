"""One shape for every error the service answers with:
``{"error": "what went wrong and what would be valid", "field": ..., "value": ...}``.

``field`` names the part of the request at fault (a body field as a dotted
path, a query or path parameter, a header, ``"body"``), ``value`` the value
received (shortened; never a token). A client's mistake is a 4xx; only a
fault of the service itself is a 500, logged with its traceback and answered
without details.
"""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from warmstart.errors import WarmstartError

__all__ = ["ServiceError", "Refused", "install_handlers", "error_body", "shown"]

log = logging.getLogger("warmstart.service")
MAX_SHOWN = 200  # characters of a received value echoed back


class ServiceError(Exception):
    """An answer with a 4xx status (or 503) and the one error shape.

    Parameters
    ----------
    status : int
    message : str
        What went wrong and what would be valid.
    field : str, optional
        The part of the request at fault.
    value : any, optional
        The value received (shortened when echoed).
    headers : dict, optional
        Extra response headers (e.g. the challenge of a 401).
    """

    def __init__(self, status: int, message: str, field: str | None = None, value: Any = None,
                 headers: dict | None = None):
        super().__init__(message)
        self.headers = headers
        self.status = status
        self.message = message
        self.field = field
        self.value = value


class Refused(ServiceError):
    """A :class:`ServiceError` raised by a write before it changed anything
    (no statement but reads, nothing in memory): the writer hands it to the
    request without undoing the other writes of its batch."""


def shown(value: Any) -> Any:
    """A received value as echoed back: plain JSON scalars as they are, anything
    else or anything long as a shortened ``repr``."""
    if value is None or isinstance(value, (bool, int)):
        return value
    if isinstance(value, float):
        return value if value == value and abs(value) != float("inf") else repr(value)
    text = value if isinstance(value, str) else repr(value)
    return text if len(text) <= MAX_SHOWN else text[:MAX_SHOWN] + "..."


def error_body(message: str, field: str | None = None, value: Any = None) -> dict:
    """The JSON body of an error answer."""
    return {"error": message, "field": field, "value": shown(value)}


def _validation_answer(exc: RequestValidationError, content_type: str) -> JSONResponse:
    first = exc.errors()[0]
    loc = [str(p) for p in first.get("loc", ())]
    where = loc[0] if loc else "body"
    path = loc[1:] if where in ("body", "query", "path", "header", "cookie") else loc
    if "[key]" in path:  # a bad key of a mapping: the mapping is the field, the key the value
        path = path[:max(0, path.index("[key]") - 1)]
    field = ".".join(path) or "body"
    kind = first.get("type", "")
    if kind == "json_invalid":
        ctx = first.get("ctx") or {}
        return JSONResponse(
            error_body(f"the body is not valid JSON ({ctx.get('error', 'syntax error')}); send a JSON object",
                       "body"), status_code=400)
    message = first.get("msg", "invalid value")
    if kind == "missing":
        message = f"{field} is required"
    elif kind == "extra_forbidden":
        message = f"{field} is not a known field of this request; see /api/v1/openapi.json"
    elif kind in ("model_attributes_type", "dict_type") and field == "body":
        if "json" not in content_type:
            return JSONResponse(error_body(
                f"the body must be JSON sent with Content-Type: application/json (got {content_type or 'none'!r})",
                "Content-Type", content_type or None), status_code=415)
        message = "the body must be a JSON object"
    else:
        message = f"{field}: {message}"
    value = None if kind == "missing" else first.get("input")
    return JSONResponse(error_body(message, field, value), status_code=422)


def install_handlers(app: FastAPI) -> None:
    """Answer every error in the one shape."""

    @app.exception_handler(ServiceError)
    async def _service_error(request: Request, exc: ServiceError) -> JSONResponse:
        headers = exc.headers or ({"WWW-Authenticate": "Bearer"} if exc.status == 401 else None)
        return JSONResponse(error_body(exc.message, exc.field, exc.value), status_code=exc.status, headers=headers)

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError) -> JSONResponse:
        return _validation_answer(exc, request.headers.get("content-type", "").lower())

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        field = {413: "body", 404: "path", 405: "method"}.get(exc.status_code)
        message = {
            404: f"no such address: {request.url.path}; the API lives under /api/v1 (see /api/v1/openapi.json)",
            405: f"{request.method} is not allowed on {request.url.path}",
            413: "the body is too large for this request; send less (ingest takes larger bodies than the rest)",
        }.get(exc.status_code, str(exc.detail))
        value = request.method if exc.status_code == 405 else None
        return JSONResponse(error_body(message, field, value), status_code=exc.status_code,
                            headers=getattr(exc, "headers", None))

    @app.exception_handler(WarmstartError)
    async def _library(request: Request, exc: WarmstartError) -> JSONResponse:
        # a library refusal that no endpoint put a field on: still the client's input
        return JSONResponse(error_body(str(exc), "body"), status_code=422)

    @app.exception_handler(Exception)
    async def _fault(request: Request, exc: Exception) -> JSONResponse:
        log.error("internal error on %s %s", request.method, request.url.path, exc_info=exc)
        return JSONResponse(error_body("internal error of the service; the server log has the details"),
                            status_code=500)
