"""Who is calling, and may they: passwords, sessions, API keys, roles and CSRF.

Principals come from an API key (``Authorization: Bearer <key>`` or ``X-API-Key: <key>``) or from the
session cookie set by ``POST /api/v1/session``. Roles are ordered viewer < technician < engineer < admin.
``require_role("engineer")`` is the dependency routers use; it returns the :class:`Principal`.

CSRF: a cookie-authenticated request with a state-changing method (POST, PUT, PATCH, DELETE) must carry
the session's CSRF token in the ``X-CSRF-Token`` header, or as the ``csrf_token`` field of a URL-encoded
form post. The token is returned by ``POST /api/v1/session`` and ``GET /api/v1/me`` and is also set as the
readable (not HttpOnly) cookie ``halfwatch_csrf``, so the dashboard's scripts can copy it into the header.
API-key requests need no CSRF token (browsers never send them on their own).
"""

from __future__ import annotations

import base64
import datetime as dt
import hashlib
import hmac
import secrets
import threading
import time
from dataclasses import dataclass

from fastapi import Depends, Request
from sqlalchemy import bindparam, select, update

from server.errors import Forbidden, Unauthorized
from server.storage.tables import ROLES, ApiKey, User, UserSession, utcnow

SESSION_COOKIE = "halfwatch_session"
CSRF_COOKIE = "halfwatch_csrf"
CSRF_HEADER = "X-CSRF-Token"
KEY_PREFIX = "hwk"
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
LAST_USED_RESOLUTION = dt.timedelta(seconds=60)


class PasswordHashing:
    """Argon2id with the cost parameters from the settings."""

    def __init__(self, settings):
        from argon2 import PasswordHasher

        self._hasher = PasswordHasher(time_cost=settings.argon2_time_cost,
                                      memory_cost=settings.argon2_memory_cost_kib,
                                      parallelism=settings.argon2_parallelism)
        self._dummy = self._hasher.hash(secrets.token_hex(8))

    def hash(self, password: str) -> str:
        return self._hasher.hash(password)

    def verify(self, stored: str | None, password: str) -> bool:
        from argon2.exceptions import InvalidHashError, VerificationError

        try:
            return self._hasher.verify(stored or self._dummy, password) and stored is not None
        except (VerificationError, InvalidHashError):
            return False


def role_rank(role: str) -> int:
    return ROLES.index(role)


def token_hash(token: str) -> str:
    return hashlib.sha256(token.encode()).hexdigest()


@dataclass(frozen=True)
class Principal:
    kind: str  # "user" or "apikey"
    id: int
    name: str
    role: str
    site_id: int | None = None  # an API key or a user limited to one site; None = every site
    via_cookie: bool = False
    csrf_token: str | None = None

    def has_role(self, role: str) -> bool:
        return role_rank(self.role) >= role_rank(role)

    def may_access_site(self, site_id: int) -> bool:
        return self.site_id is None or self.site_id == site_id

    @property
    def label(self) -> str:
        return f"{self.kind}:{self.name}"


def new_api_key() -> tuple[str, str, str]:
    """(full key shown once, public prefix, hash stored)."""
    prefix = secrets.token_hex(4)
    key = f"{KEY_PREFIX}_{prefix}_{secrets.token_urlsafe(24)}"
    return key, prefix, token_hash(key)


_KEY_BY_PREFIX = select(ApiKey.__table__).where(ApiKey.__table__.c.prefix == bindparam("prefix"))


def _api_key_from(request: Request) -> str | None:
    value = request.headers.get("x-api-key")
    if value:
        return value.strip()
    auth = request.headers.get("authorization", "")
    scheme, _, credentials = auth.partition(" ")
    if scheme.lower() == "bearer" and credentials.strip():
        return credentials.strip()
    return None


class KeyCache:
    """Principals of API keys looked up in the last ``ttl_s`` seconds (per process), so a sensor's stream
    of records costs one key lookup per ``ttl_s`` instead of one per request. A revoked or deleted key is
    refused at the latest ``ttl_s`` after the change (``api_key_cache_s``) in every process, and at once in
    the process that revoked it (``services.users.revoke_api_key``). Only keys that were accepted are kept,
    keyed by the key's SHA-256; unknown keys are looked up every time."""

    def __init__(self, ttl_s: float, max_entries: int = 10_000):
        self.ttl_s = float(ttl_s)
        self.max_entries = max_entries
        self._entries: dict[str, tuple[float, Principal]] = {}
        self._lock = threading.Lock()

    def get(self, digest: str) -> Principal | None:
        if self.ttl_s <= 0:
            return None
        got = self._entries.get(digest)
        if got is None or time.monotonic() >= got[0]:
            return None
        return got[1]

    def put(self, digest: str, principal: Principal) -> None:
        if self.ttl_s <= 0:
            return
        with self._lock:
            if len(self._entries) >= self.max_entries:
                self._entries.clear()
            self._entries[digest] = (time.monotonic() + self.ttl_s, principal)

    def forget(self, key_id: int | None = None) -> None:
        """Drop the key with this id (every key if None)."""
        with self._lock:
            if key_id is None:
                self._entries.clear()
            else:
                self._entries = {d: e for d, e in self._entries.items() if e[1].id != key_id}


def key_cache(db) -> KeyCache | None:
    return getattr(db, "key_cache", None)


def _principal_from_key(db, key: str) -> Principal:
    parts = key.split("_", 2)
    if len(parts) != 3 or parts[0] != KEY_PREFIX:
        raise Unauthorized("the API key is malformed; send the whole key as shown when it was created")
    cache = key_cache(db)
    digest = token_hash(key)
    if cache is not None and (hit := cache.get(digest)) is not None:
        return hit
    now = utcnow()
    with db.read_engine.connect() as conn:
        row = conn.execute(_KEY_BY_PREFIX, {"prefix": parts[1]}).first()
    if row is None or not hmac.compare_digest(row.key_hash, digest):
        raise Unauthorized("unknown API key; ask an admin for a key (halfwatch apikey create)")
    if row.revoked_at is not None:
        raise Unauthorized("this API key was revoked; ask an admin for a new one")
    if row.last_used_at is None or now - row.last_used_at > LAST_USED_RESOLUTION:
        with db.write() as conn:
            conn.execute(update(ApiKey.__table__).where(ApiKey.__table__.c.id == row.id)
                         .values(last_used_at=now))
    principal = Principal("apikey", row.id, row.name, row.role, site_id=row.site_id)
    if cache is not None:
        cache.put(digest, principal)
    return principal


def _principal_from_cookie(db, token: str) -> Principal | None:
    with db.read() as s:
        row = s.execute(
            select(UserSession, User).join(User, User.id == UserSession.user_id)
            .where(UserSession.token_hash == token_hash(token))
        ).first()
    if row is None:
        return None
    sess, user = row
    if sess.expires_at < utcnow() or not user.active:
        return None
    return Principal("user", user.id, user.username, user.role, site_id=user.site_id, via_cookie=True,
                     csrf_token=sess.csrf_token)


def signing_key(settings) -> bytes:
    """The key session cookies are signed with: ``HALFWATCH_SECRET_KEY``, or (unset) a random key of this
    process, so sessions then last only as long as the process and are not shared with other processes."""
    return (settings.secret_key or secrets.token_hex(32)).encode()


def _signature(key: bytes, token: str) -> str:
    digest = hmac.new(key, token.encode(), hashlib.sha256).digest()
    return base64.urlsafe_b64encode(digest).decode().rstrip("=")


def sign_session(key: bytes, token: str) -> str:
    """The session cookie's value: ``<token>.<HMAC-SHA256 of the token under the signing key>``."""
    return f"{token}.{_signature(key, token)}"


def session_token(request: Request) -> str | None:
    """The session token of the request's cookie if its signature is right (no database needed to refuse
    a forged or stale cookie: changing HALFWATCH_SECRET_KEY ends every session)."""
    value = request.cookies.get(SESSION_COOKIE)
    if not value or "." not in value:
        return None
    token, _, sig = value.rpartition(".")
    key = getattr(request.app.state, "signing_key", None)
    if key is None or not hmac.compare_digest(sig, _signature(key, token)):
        return None
    return token


def optional_principal(request: Request) -> Principal | None:
    db = request.app.state.db
    key = _api_key_from(request)
    if key:
        return _principal_from_key(db, key)
    token = session_token(request)
    if token:
        return _principal_from_cookie(db, token)
    return None


async def _csrf_ok(request: Request, principal: Principal) -> bool:
    sent = request.headers.get(CSRF_HEADER.lower())
    if not sent and request.headers.get("content-type", "").startswith("application/x-www-form-urlencoded"):
        form = await request.form()
        sent = form.get("csrf_token")
    return bool(sent) and principal.csrf_token is not None and hmac.compare_digest(str(sent),
                                                                                   principal.csrf_token)


_NO_CREDENTIALS = ("log in (POST /api/v1/session) or send an API key "
                   "(Authorization: Bearer <key> or X-API-Key)")


def _csrf_refused() -> Forbidden:
    return Forbidden(f"missing or wrong CSRF token; send the {CSRF_HEADER} header with the token from "
                     f"GET /api/v1/me (or the {CSRF_COOKIE} cookie)", field=CSRF_HEADER)


def _role_refused(role: str, principal: Principal) -> Forbidden:
    return Forbidden(f"this needs the {role} role; you are {principal.role}")


def has_credentials(request: Request) -> bool:
    """Cheap (no database): does the request carry a key or a session cookie at all?"""
    return bool(_api_key_from(request) or request.cookies.get(SESSION_COOKIE))


def authorize(request: Request, role: str) -> Principal:
    """Blocking form of ``require_role`` for handlers that already run in the threadpool (one thread hop
    for authentication and work). The CSRF token must come in the header here, not in a form field."""
    if not has_credentials(request):
        raise Unauthorized(_NO_CREDENTIALS)
    principal = optional_principal(request)
    if principal is None:
        raise Unauthorized(_NO_CREDENTIALS)
    if principal.via_cookie and request.method not in SAFE_METHODS:
        sent = request.headers.get(CSRF_HEADER.lower())
        if not sent or not hmac.compare_digest(sent, principal.csrf_token or ""):
            raise _csrf_refused()
    if not principal.has_role(role):
        raise _role_refused(role, principal)
    request.state.principal = principal
    return principal


def require_role(role: str):
    """A dependency: the caller must be authenticated with at least ``role``; returns the Principal."""
    if role not in ROLES:
        raise ValueError(f"unknown role {role!r}")

    async def dependency(request: Request) -> Principal:
        from starlette.concurrency import run_in_threadpool

        principal = await run_in_threadpool(optional_principal, request)
        if principal is None:
            raise Unauthorized(_NO_CREDENTIALS)
        if principal.via_cookie and request.method not in SAFE_METHODS and not await _csrf_ok(request,
                                                                                               principal):
            raise _csrf_refused()
        if not principal.has_role(role):
            raise _role_refused(role, principal)
        request.state.principal = principal
        return principal

    dependency.__name__ = f"require_{role}"
    return dependency


def current_principal(principal: Principal = Depends(require_role("viewer"))) -> Principal:
    return principal
