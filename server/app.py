"""The app factory: ``create_app(settings)``; ``uvicorn server.app:create_app --factory`` works.

The database handle is built here (``app.state.db``) and checked against the newest migration, so an
unmigrated database is refused at start with a message that says to run ``halfwatch db upgrade``.
Routers are every module in ``server/routes/`` that defines ``router``.
"""

from __future__ import annotations

import logging
import threading
from contextlib import asynccontextmanager

from fastapi import FastAPI

from server.errors import ERROR_RESPONSES, PayloadTooLarge, error_body
from server.http_errors import install_error_handlers
from server.settings import Settings
from server.storage import Database

log = logging.getLogger("halfwatch.app")

UPLOAD_PATH_SUFFIX = "/uploads"


class BodyLimit:
    """Refuse request bodies above the limit, by Content-Length or while streaming (413)."""

    def __init__(self, app, settings: Settings):
        self.app = app
        self.settings = settings

    def _limit(self, path: str) -> int:
        if path.endswith(UPLOAD_PATH_SUFFIX):
            return max(self.settings.max_upload_bytes, self.settings.max_body_bytes)
        return self.settings.max_body_bytes

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        limit = self._limit(scope.get("path", ""))
        for name, value in scope.get("headers", ()):
            if name == b"content-length" and value.isdigit() and int(value) > limit:
                return await self._refuse(send, limit)
        seen = 0

        async def limited_receive():
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise PayloadTooLarge(_too_large(limit), field="body")
            return message

        return await self.app(scope, limited_receive, send)

    async def _refuse(self, send, limit: int):
        import json

        body = json.dumps(error_body(413, "payload_too_large", _too_large(limit), "body")).encode()
        await send({"type": "http.response.start", "status": 413,
                    "headers": [(b"content-type", b"application/json"),
                                (b"content-length", str(len(body)).encode()), (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": body})


def _too_large(limit: int) -> str:
    return f"request body is larger than {limit} bytes; send shorter records or split the upload"


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    db = Database.from_settings(settings)
    db.check_schema()

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        stop = threading.Event()
        thread = None
        if settings.embedded_worker:
            from server.worker import run_forever

            thread = threading.Thread(target=run_forever, args=(db, settings),
                                      kwargs={"stop": stop}, name="halfwatch-worker", daemon=True)
            thread.start()
        try:
            yield
        finally:
            stop.set()
            if thread is not None:
                thread.join(timeout=settings.lease_s)
            db.dispose()

    app = FastAPI(
        title="halfwatch",
        version="0.1.0",
        summary="Condition monitoring for subharmonic (0.5X) onset. Not a protection or trip system.",
        lifespan=lifespan,
        responses=ERROR_RESPONSES,
        docs_url=None,  # /docs is served offline by server/routes/api_docs.py (no CDN, CSP-compatible)
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.db = db
    from server.security import KeyCache, PasswordHashing

    app.state.passwords = PasswordHashing(settings)
    from server.security import signing_key

    app.state.signing_key = signing_key(settings)  # session cookies are signed with HALFWATCH_SECRET_KEY
    if not settings.secret_key:
        log.warning("HALFWATCH_SECRET_KEY is not set: session cookies are signed with a random key of this "
                    "process, so logins end when it restarts and other API processes do not accept them")
    db.key_cache = KeyCache(settings.api_key_cache_s)  # revocation honoured within api_key_cache_s
    install_error_handlers(app)
    from server.routes import discover

    for router in discover():
        app.include_router(router)
    app.add_middleware(BodyLimit, settings=settings)
    from server.hardening import HashSlots, IngestAdmission, IngestPreAuth, LoginThrottle, SecurityHeaders

    app.state.login_throttle = LoginThrottle(db, settings.login_max_failures, settings.login_window_s)
    app.state.hash_slots = HashSlots(settings.login_hash_slots)
    app.add_middleware(IngestPreAuth, settings=settings, db=db)  # 401/403 from the headers, body unread
    app.add_middleware(IngestAdmission, settings=settings, db=db)  # before the body is read: cheap refusal
    from server.origin import OriginCheck

    app.add_middleware(OriginCheck, settings=settings)  # cross-site cookie writes and logins: 403
    app.add_middleware(SecurityHeaders, settings=settings)
    from server.metrics import install_metrics

    install_metrics(app, db, settings)  # outermost: times every request, /metrics renders it
    return app
