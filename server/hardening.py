"""Protective middleware: security headers, bounded ingest admission, login throttling.

- :class:`SecurityHeaders` adds a Content-Security-Policy with no remote origins, ``nosniff``,
  ``frame-ancestors 'none'`` / ``X-Frame-Options: DENY`` and a strict Referrer-Policy to every response
  (HSTS as well when ``session_cookie_secure`` says the service runs behind TLS).
- :class:`IngestAdmission` bounds the number of ingest requests being worked on at once. One more is
  refused at once with 503 and ``Retry-After`` (nothing stored), so a burst from many sensors sheds
  load instead of piling up memory and latency until the process falls over. It also refuses new
  records while the analysis queue holds ``max_queued_jobs`` or more (workers far behind): the sensors
  keep their data and retry, instead of the backlog growing without bound.
- :class:`LoginThrottle` counts failed logins per user name and per client address in a sliding
  window; past the limit the login answers 429 with ``Retry-After`` without checking the password.
  An address (``addr:`` key) may fail four times as often as one user name, since a site's users may
  share one address behind NAT. The counts live in the process (each API process throttles on its own).
"""

from __future__ import annotations

import json
import threading
import time
from collections import deque

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

        async def send_with_headers(message):
            if message["type"] == "http.response.start":
                present = {name.lower() for name, _ in message.get("headers", ())}
                extra = [(n, v) for n, v in self.headers if n not in present]
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


class TooManyAttempts(AppError):
    status = 429
    code = "too_many_requests"


class LoginThrottle:
    """Failed logins per key (user name, client address) within ``window_s``; thread-safe."""

    def __init__(self, max_failures: int, window_s: float, clock=time.monotonic):
        self.max_failures = max_failures
        self.window_s = window_s
        self.clock = clock
        self._failures: dict[str, deque[float]] = {}
        self._lock = threading.Lock()

    def _recent(self, key: str, now: float) -> deque[float]:
        q = self._failures.setdefault(key, deque())
        while q and now - q[0] > self.window_s:
            q.popleft()
        return q

    def limit(self, key: str) -> int:
        return self.max_failures * (ADDRESS_FACTOR if key.startswith("addr:") else 1)

    def check(self, *keys: str) -> None:
        """Raise 429 if any key has used up its failures; the password is not even looked at."""
        now = self.clock()
        with self._lock:
            waits = []
            for key in keys:
                q = self._recent(key, now)
                if len(q) >= self.limit(key):
                    waits.append(self.window_s - (now - q[0]))
        if waits:
            wait = max(1, int(max(waits)) + 1)
            raise TooManyAttempts(f"too many failed logins; wait {wait} s before trying again",
                                  field="username", headers={"Retry-After": str(wait)})

    def failed(self, *keys: str) -> None:
        now = self.clock()
        with self._lock:
            for key in keys:
                self._recent(key, now).append(now)
            if len(self._failures) > 10_000:  # bound the memory under a spray of user names
                for k in [k for k, q in self._failures.items() if not q or now - q[-1] > self.window_s]:
                    del self._failures[k]

    def succeeded(self, username_key: str) -> None:
        with self._lock:
            self._failures.pop(username_key, None)
