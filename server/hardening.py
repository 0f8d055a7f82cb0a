"""Protective middleware: security headers, bounded ingest admission, login throttling.

- :class:`SecurityHeaders` adds a Content-Security-Policy with no remote origins, ``nosniff``,
  ``frame-ancestors 'none'`` / ``X-Frame-Options: DENY`` and a strict Referrer-Policy to every response
  (HSTS as well when ``session_cookie_secure`` says the service runs behind TLS), and
  ``Cache-Control: no-store`` to every ``/api/`` answer (plant data, CSRF tokens, keys).
- :class:`IngestAdmission` bounds the number of ingest requests being worked on at once. One more is
  refused at once with 503 and ``Retry-After`` (nothing stored), so a burst from many sensors sheds
  load instead of piling up memory and latency until the process falls over. It also refuses new
  records while the analysis queue holds ``max_queued_jobs`` or more (workers far behind): the sensors
  keep their data and retry, instead of the backlog growing without bound.
- :class:`LoginThrottle` counts login attempts per user name and per client address in a sliding
  window, in the database (table ``login_attempts``) so that every API process shares the counts; the
  attempt is counted *before* the password is hashed, so concurrent attempts cannot slip past the
  limit. Past the limit the login answers 429 with ``Retry-After`` without checking the password.
  An address (``addr:`` key) may fail four times as often as one user name, since a site's users may
  share one address behind NAT.
- :class:`HashSlots` bounds the password hashes being computed at once (``login_hash_slots``); one
  more waits briefly, then gets 503 with ``Retry-After``. Memory for hashing stays below
  ``login_hash_slots`` x ``argon2_memory_cost_kib``.
"""

from __future__ import annotations

import json
import threading
import time

from server.errors import AppError, error_body

CSP = ("default-src 'self'; script-src 'self'; style-src 'self' 'unsafe-inline'; img-src 'self' data: blob:; "
       "font-src 'self' data:; connect-src 'self'; object-src 'none'; base-uri 'self'; form-action 'self'; "
       "frame-ancestors 'none'")

INGEST_SUFFIXES = ("/records", "/records/file", "/uploads")
ADDRESS_FACTOR = 4
QUEUE_CHECK_S = 1.0


def _security_headers(tls: bool) -> list[tuple[bytes, bytes]]:
    headers = [
        (b"content-security-policy", CSP.encode()),
        (b"x-content-type-options", b"nosniff"),
        (b"x-frame-options", b"DENY"),
        (b"referrer-policy", b"no-referrer"),
        (b"cross-origin-opener-policy", b"same-origin"),
        (b"permissions-policy", b"camera=(), microphone=(), geolocation=()"),
    ]
    if tls:
        headers.append((b"strict-transport-security", b"max-age=31536000"))
    return headers


class SecurityHeaders:
    def __init__(self, app, settings):
        self.app = app
        self.headers = _security_headers(bool(settings.session_cookie_secure))

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)

        api = scope.get("path", "").startswith("/api/")

        async def send_with_headers(message):
            if message["type"] == "http.response.start":
                present = {name.lower() for name, _ in message.get("headers", ())}
                extra = [(n, v) for n, v in self.headers if n not in present]
                if api and b"cache-control" not in present:  # plant data and tokens stay out of caches
                    extra.append((b"cache-control", b"no-store"))
                message = {**message, "headers": [*message.get("headers", ()), *extra]}
            await send(message)

        return await self.app(scope, receive, send_with_headers)


def is_ingest(scope) -> bool:
    return (scope.get("method") == "POST" and scope.get("path", "").startswith("/api/v1/")
            and scope["path"].endswith(INGEST_SUFFIXES))


class IngestAdmission:
    """At most ``settings.max_inflight_ingests`` ingest requests at once; the next gets 503 + Retry-After."""

    def __init__(self, app, settings, db=None):
        self.app = app
        self.limit = settings.max_inflight_ingests
        self.retry_after_s = settings.ingest_retry_after_s
        self.max_queued = settings.max_queued_jobs if db is not None else 0
        self.db = db
        self.inflight = 0
        self.refused = 0
        self._depth, self._checked = 0, float("-inf")

    async def _queue_full(self) -> bool:
        """Queued jobs >= max_queued_jobs, counted at most once a second (off the event loop)."""
        if not self.max_queued:
            return False
        now = time.monotonic()
        if now - self._checked >= QUEUE_CHECK_S:
            self._checked = now
            from starlette.concurrency import run_in_threadpool

            self._depth = await run_in_threadpool(self._count_queued)
        return self._depth >= self.max_queued

    def _count_queued(self) -> int:
        from sqlalchemy import func, select

        from server.storage.tables import Job

        with self.db.read() as s:
            return int(s.scalar(select(func.count()).select_from(Job).where(Job.state == "queued")) or 0)

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http" or not is_ingest(scope):
            return await self.app(scope, receive, send)
        if self.inflight >= self.limit:  # one event loop: no lock needed between check and increment
            self.refused += 1
            return await self._refuse(send, f"the service is taking {self.limit} records at once already")
        if await self._queue_full():
            self.refused += 1
            return await self._refuse(send, f"the analysis queue holds {self._depth} records (limit "
                                            f"{self.max_queued}); the workers are behind")
        self.inflight += 1
        try:
            return await self.app(scope, receive, send)
        finally:
            self.inflight -= 1

    async def _refuse(self, send, why: str):
        body = json.dumps(error_body(503, "overloaded", f"{why}; nothing was stored, send this record again "
                                     f"after {self.retry_after_s} s", None)).encode()
        await send({"type": "http.response.start", "status": 503,
                    "headers": [(b"content-type", b"application/json"),
                                (b"content-length", str(len(body)).encode()),
                                (b"retry-after", str(self.retry_after_s).encode())]})
        await send({"type": "http.response.body", "body": body})


class IngestPreAuth:
    """Authenticate ingest requests (records, record files, route uploads) from their headers alone,
    before a byte of the body is read: no credentials, an unknown or revoked key, or a role below
    technician is answered at once (401/403) and the body is never read. The routes still authorize
    as before (CSRF for cookie sessions, site scope); this only keeps unauthenticated bodies out."""

    def __init__(self, app, settings, db=None):
        self.app = app
        self.db = db

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http" or self.db is None or not is_ingest(scope):
            return await self.app(scope, receive, send)
        from starlette.concurrency import run_in_threadpool

        try:
            await run_in_threadpool(self._check, scope)
        except AppError as exc:
            return await _answer(send, exc.status, exc.code, exc.message, exc.field,
                                 [(b"connection", b"close")])
        except Exception:  # noqa: BLE001 - e.g. a busy database: the route answers it in the one shape
            pass
        return await self.app(scope, receive, send)

    def _check(self, scope) -> None:
        from starlette.requests import Request

        from server.errors import Forbidden, Unauthorized
        from server.security import (
            _NO_CREDENTIALS,
            _api_key_from,
            _principal_from_cookie,
            _principal_from_key,
            session_token,
        )

        request = Request(scope)
        key = _api_key_from(request)
        token = session_token(request)
        principal = (_principal_from_key(self.db, key) if key else
                     _principal_from_cookie(self.db, token) if token else None)
        if principal is None:
            raise Unauthorized(_NO_CREDENTIALS)
        if not principal.has_role("technician"):
            raise Forbidden(f"this needs the technician role; you are {principal.role}")


async def _answer(send, status: int, code: str, message: str, field, extra_headers=()) -> None:
    body = json.dumps(error_body(status, code, message, field)).encode()
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-type", b"application/json"),
                            (b"content-length", str(len(body)).encode()), *extra_headers]})
    await send({"type": "http.response.body", "body": body})


class TooManyAttempts(AppError):
    status = 429
    code = "too_many_requests"


class LoginThrottle:
    """Login attempts per key (user name, client address) within ``window_s``, shared through the database.

    ``begin(*keys)`` writes one attempt row per key *before* the password is hashed and then counts the
    rows of each key in the window (its own included): above the key's limit the attempt is refused
    with 429 and its rows are removed again. Since every attempt that goes on to the hash was written
    before it counted, N concurrent attempts can never let more than the limit through, in one process
    or in many. ``succeeded`` removes the attempt and the user name's earlier failures; a failure just
    stays counted. Times are epoch seconds from ``clock`` (wall clock: shared between processes).
    """

    PRUNE_EVERY = 200  # attempts between deletions of rows older than the window

    def __init__(self, db, max_failures: int, window_s: float, clock=time.time):
        self.db = db
        self.max_failures = max_failures
        self.window_s = window_s
        self.clock = clock
        self._since_prune = 0
        self._lock = threading.Lock()

    def limit(self, key: str) -> int:
        return self.max_failures * (ADDRESS_FACTOR if key.startswith("addr:") else 1)

    def begin(self, *keys: str) -> list[int]:
        """Count this attempt; raise 429 (+ Retry-After) if any key is over its limit. Returns row ids."""
        from sqlalchemy import delete, func, select

        from server.logins.tables import LoginAttempt as LA

        now = self.clock()
        with self.db.unit_of_work() as s:
            rows = [LA(key=k[:200], at_s=now) for k in keys]
            s.add_all(rows)
            s.flush()
            ids = [r.id for r in rows]
        with self.db.read() as s:  # after the commit: sees every attempt committed before it
            counts = s.execute(select(LA.key, func.count(), func.min(LA.at_s))
                               .where(LA.key.in_([k[:200] for k in keys]), LA.at_s > now - self.window_s)
                               .group_by(LA.key)).all()
        waits = [self.window_s - (now - oldest) for key, n, oldest in counts if n > self.limit(key)]
        if waits:
            self.release(ids)
            wait = max(1, int(max(waits)) + 1)
            raise TooManyAttempts(f"too many failed logins; wait {wait} s before trying again",
                                  field="username", headers={"Retry-After": str(wait)})
        with self._lock:
            self._since_prune += 1
            prune = self._since_prune >= self.PRUNE_EVERY
            if prune:
                self._since_prune = 0
        if prune:  # bound the table under a spray of user names
            with self.db.unit_of_work() as s:
                s.execute(delete(LA).where(LA.at_s < now - self.window_s))
        return ids

    def release(self, ids: list[int]) -> None:
        """Forget attempts that never reached the password check."""
        from sqlalchemy import delete

        from server.logins.tables import LoginAttempt as LA

        with self.db.unit_of_work() as s:
            s.execute(delete(LA).where(LA.id.in_(ids)))

    def succeeded(self, ids: list[int], username_key: str) -> None:
        from sqlalchemy import delete, or_

        from server.logins.tables import LoginAttempt as LA

        with self.db.unit_of_work() as s:
            s.execute(delete(LA).where(or_(LA.id.in_(ids), LA.key == username_key[:200])))


class HashSlots:
    """At most ``n`` password hashes at once (Argon2 takes ``argon2_memory_cost_kib`` each).

    ``acquire`` waits up to ``wait_s`` for a slot, in the calling (threadpool) thread; if none frees
    up, the login answers 503 with ``Retry-After`` instead of growing memory without bound.
    """

    def __init__(self, n: int, wait_s: float = 2.0):
        self.n = n
        self.wait_s = wait_s
        self._sem = threading.BoundedSemaphore(n)
        self.refused = 0

    def acquire(self) -> None:
        if not self._sem.acquire(timeout=self.wait_s):
            self.refused += 1
            from server.errors import Unavailable

            wait = max(1, int(self.wait_s))
            raise Unavailable(f"{self.n} logins are being checked already; nothing was checked, log in "
                              f"again after {wait} s", field="username", headers={"Retry-After": str(wait)})

    def release(self) -> None:
        self._sem.release()
