"""The AppError tree and the one JSON error shape of the whole API.

Every error response is ``{"ok": false, "error": {"code", "message", "field"}, "status"}``:
AppError and its subclasses, HTTPException, request validation errors (the message names the field
and the fix), bad signals (SignalError), a busy or full database (503 + Retry-After) and unexpected
errors (logged; the client gets a reference, never a traceback).

Domain and storage code raise these errors without knowing about HTTP: this module imports no web
framework. The mapping to HTTP responses (exception handlers) lives beside the app, in
:mod:`server.http_errors`.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel


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


def _field_of(loc) -> str | None:
    parts = [str(p) for p in loc if p not in ("body", "query", "path", "header", "cookie", "form")]
    return ".".join(parts) or (str(loc[0]) if loc else None)
