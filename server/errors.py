"""The AppError tree and the one JSON error shape of the whole API.

Every error response is ``{"ok": false, "error": {"code", "message", "field"}, "status"}``:
AppError and its subclasses, HTTPException, request validation errors (the message names the field
and the fix), bad signals (SignalError), a busy or full database (503 + Retry-After) and unexpected
errors (logged; the client gets a reference, never a traceback).

A browser-facing part may set ``app.state.html_error_renderer(request, status, body) -> Response | None``
to render errors of non-API pages as HTML; returning None keeps the JSON.
"""

from __future__ import annotations

import logging
import uuid
from typing import Literal

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from pydantic import BaseModel
from starlette.exceptions import HTTPException as StarletteHTTPException

log = logging.getLogger("halfwatch.errors")


class AppError(Exception):
    status = 400
    code = "bad_request"

    def __init__(self, message: str, *, field: str | None = None, status: int | None = None,
                 code: str | None = None, headers: dict[str, str] | None = None):
        super().__init__(message)
        self.message = message
        self.field = field
        if status is not None:
            self.status = status
        if code is not None:
            self.code = code
        self.headers = headers or {}


class NotFound(AppError):
    status = 404
    code = "not_found"


class Conflict(AppError):
    status = 409
    code = "conflict"


class Unauthorized(AppError):
    status = 401
    code = "unauthorized"


class Forbidden(AppError):
    status = 403
    code = "forbidden"


class PayloadTooLarge(AppError):
    status = 413
    code = "payload_too_large"


class Unavailable(AppError):
    status = 503
    code = "unavailable"


class ErrorDetail(BaseModel):
    code: str
    message: str
    field: str | None = None


class ErrorBody(BaseModel):
    """The one error shape, as documented in the OpenAPI schema for every operation."""

    ok: Literal[False]
    error: ErrorDetail
    status: int


_DOCUMENTED = {400: "Malformed request (body not parseable, bad value)", 401: "Not logged in / no API key",
               403: "Role, site scope or CSRF token does not allow this", 404: "No such object",
               409: "Conflicts with what is stored", 413: "Body or upload too large",
               415: "Unsupported content type", 422: "Invalid field (the message names it and the fix)",
               429: "Too many failed logins; see Retry-After",
               503: "Overloaded, or the database is busy or full; nothing stored; see Retry-After"}
ERROR_RESPONSES = {status: {"model": ErrorBody, "description": text} for status, text in _DOCUMENTED.items()}


def error_body(status: int, code: str, message: str, field: str | None = None) -> dict:
    """The canonical JSON error body used by every error response."""
    return {"ok": False, "error": {"code": code, "message": message, "field": field}, "status": status}


_HTTP_CODES = {400: "bad_request", 401: "unauthorized", 403: "forbidden", 404: "not_found",
               405: "method_not_allowed", 406: "not_acceptable", 409: "conflict", 413: "payload_too_large",
               415: "unsupported_media_type", 422: "invalid", 429: "too_many_requests", 503: "unavailable"}

_FIXES = {
    "missing": "add it",
    "int_parsing": "give a whole number",
    "float_parsing": "give a number",
    "bool_parsing": "give true or false",
    "datetime_parsing": "give an ISO 8601 time with a zone, e.g. 2026-03-01T08:00:00Z",
    "datetime_from_date_parsing": "give an ISO 8601 time with a zone, e.g. 2026-03-01T08:00:00Z",
    "timezone_aware": "add a zone, e.g. Z or +01:00",
    "json_invalid": "send valid JSON",
    "extra_forbidden": "remove it",
    "string_type": "give a text value",
    "enum": "use one of the listed values",
    "literal_error": "use one of the listed values",
}


def _respond(request: Request, status: int, body: dict, headers: dict | None = None) -> Response:
    renderer = getattr(request.app.state, "html_error_renderer", None)
    if renderer is not None:
        html = renderer(request, status, body)
        if html is not None:
            return html
    return JSONResponse(body, status_code=status, headers=headers)


def _field_of(loc) -> str | None:
    parts = [str(p) for p in loc if p not in ("body", "query", "path", "header", "cookie", "form")]
    return ".".join(parts) or (str(loc[0]) if loc else None)


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(AppError)
    async def _app_error(request: Request, exc: AppError):
        return _respond(request, exc.status, error_body(exc.status, exc.code, exc.message, exc.field),
                        exc.headers)

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(request: Request, exc: StarletteHTTPException):
        code = _HTTP_CODES.get(exc.status_code, "error")
        message = exc.detail if isinstance(exc.detail, str) else str(exc.detail)
        if exc.status_code == 404 and message == "Not Found":
            message = f"no such path {request.url.path}; see /docs for the API"
        return _respond(request, exc.status_code, error_body(exc.status_code, code, message),
                        getattr(exc, "headers", None))

    @app.exception_handler(RequestValidationError)
    async def _validation_error(request: Request, exc: RequestValidationError):
        errors = exc.errors()
        first = errors[0] if errors else {"loc": (), "msg": "invalid request", "type": ""}
        field = _field_of(first.get("loc", ()))
        fix = _FIXES.get(first.get("type", ""), "correct it")
        msg = str(first.get("msg", "invalid")).removeprefix("Value error, ")
        message = f"{field}: {msg}; {fix}" if field else f"{msg}; {fix}"
        if len(errors) > 1:
            message += f" (and {len(errors) - 1} more problem(s))"
        return _respond(request, 422, error_body(422, "invalid", message, field))

    try:
        from analysis.errors import SignalError
    except ImportError:  # pragma: no cover - the analysis core is part of the package
        SignalError = None
    if SignalError is not None:
        @app.exception_handler(SignalError)
        async def _signal_error(request: Request, exc):
            field = getattr(exc, "field", None)
            field = {"sample_rate_hz": "fs_hz"}.get(field, field)  # the API's name for it
            return _respond(request, 422, error_body(422, "bad_signal", str(exc), field))

    from sqlalchemy.exc import DataError, OperationalError

    @app.exception_handler(DataError)
    async def _data_error(request: Request, exc: DataError):
        # e.g. an id beyond the database's integer range (PostgreSQL refuses it; SQLite just finds nothing)
        log.info("value refused by the database on %s %s: %s", request.method, request.url.path, exc.orig)
        return _respond(request, 400, error_body(400, "bad_request",
                        "a value in the request is out of range (ids are whole numbers below 2147483648)"))

    @app.exception_handler(OperationalError)
    async def _db_error(request: Request, exc: OperationalError):
        text = str(exc.orig if exc.orig is not None else exc).lower()
        if "locked" in text or "busy" in text or "full" in text or "could not connect" in text:
            log.warning("database unavailable: %s", text)
            return _respond(request, 503, error_body(503, "unavailable",
                            "the database is busy or full; nothing was stored, retry shortly"),
                            {"Retry-After": "5"})
        return _unexpected(request, exc)

    @app.exception_handler(OverflowError)
    async def _overflow(request: Request, exc: OverflowError):  # e.g. an id beyond the database's integers
        return _respond(request, 400, error_body(400, "bad_request",
                        "a number in the request is too large to be stored or looked up; check the ids"))

    @app.exception_handler(Exception)
    async def _any_error(request: Request, exc: Exception):
        return _unexpected(request, exc)


def _unexpected(request: Request, exc: Exception) -> Response:
    ref = uuid.uuid4().hex[:12]
    log.error("unexpected error %s on %s %s", ref, request.method, request.url.path, exc_info=exc)
    return _respond(request, 500, error_body(500, "internal",
                    f"internal error (reference {ref}); nothing is wrong with your request format, "
                    "the server log has the details"))
