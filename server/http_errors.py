"""HTTP mapping of the errors: the exception handlers that give every error the one JSON shape.

AppError and its subclasses, HTTPException, request validation errors (the message names the field
and the fix), bad signals (SignalError), a busy or full database (503 + Retry-After) and unexpected
errors (logged; the client gets a reference, never a traceback). The errors themselves are in
:mod:`server.errors`, which imports no web framework.

A browser-facing part may set ``app.state.html_error_renderer(request, status, body) -> Response | None``
to render errors of non-API pages as HTML; returning None keeps the JSON.
"""

from __future__ import annotations

import logging
import uuid

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException

from server.errors import _FIXES, _HTTP_CODES, AppError, _field_of, error_body

log = logging.getLogger("halfwatch.errors")


def _respond(request: Request, status: int, body: dict, headers: dict | None = None) -> Response:
    renderer = getattr(request.app.state, "html_error_renderer", None)
    if renderer is not None:
        html = renderer(request, status, body)
        if html is not None:
            return html
    return JSONResponse(body, status_code=status, headers=headers)


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
