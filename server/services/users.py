"""Users, sessions and API keys (write side)."""

from __future__ import annotations

import datetime as dt
import functools
import secrets
from pathlib import Path

from sqlalchemy import delete, select

from server import audit
from server.errors import AppError, Conflict, NotFound, Unauthorized
from server.names import EMAIL_RE, check_name, name_problem
from server.security import PasswordHashing, new_api_key, token_hash
from server.storage.tables import ROLES, ApiKey, Site, User, UserSession, utcnow


class UserError(AppError):
    pass


MIN_PASSWORD = 8
PASSWORD_RULE = (f"a password needs at least {MIN_PASSWORD} characters, must not contain the user name, "
                 "must not be one of the very common passwords, and must not be one character repeated")


@functools.cache
def common_passwords() -> frozenset[str]:
    """The shipped list (server/common_passwords.txt), lower case."""
    text = (Path(__file__).resolve().parents[1] / "common_passwords.txt").read_text(encoding="utf-8")
    return frozenset(w.strip().lower() for w in text.splitlines() if w.strip() and not w.startswith("#"))


def password_problem(password: str, username: str = "") -> str | None:
    """None if the password is acceptable, else which rule it breaks."""
    if len(password) < MIN_PASSWORD:
        return f"it is shorter than {MIN_PASSWORD} characters"
    if len(set(password)) == 1:
        return "it is one character repeated"
    if username and username.strip().lower() in password.lower():
        return "it contains the user name"
    if password.lower() in common_passwords():
        return "it is one of the very common passwords"
    return None


def password_rule(password: str, username: str = "") -> None:
    problem = password_problem(password, username)
    if problem is not None:
        raise UserError(f"password refused: {problem}; {PASSWORD_RULE}", field="password", status=422,
                        code="invalid")


def check_email(email: str, field: str = "email") -> str:
    """'' (no address) or one plain address like planner@example.com."""
    email = (email or "").strip()
    if email and (not EMAIL_RE.match(email) or len(email) > 200 or name_problem(email)):
        raise UserError(f"{field}: give one address like planner@example.com, or leave it empty",
                        field=field, status=422, code="invalid")
    return email


def _user_dict(u: User) -> dict:
    return {"id": u.id, "username": u.username, "email": u.email, "role": u.role, "active": u.active,
            "site_id": u.site_id}


def find_site_id(s, site: str | int | None) -> int | None:
    """The id of the site a user or a key is limited to, from its id or name; None (or '') = every site."""
    if site is None or site == "":
        return None
    found = s.get(Site, int(site)) if str(site).isdigit() else None
    found = found or s.scalar(select(Site).where(Site.name == str(site)))
    if found is None:
        raise UserError(f"no site {site!r}; give a site name or id, or leave it out for every site",
                        field="site_id", status=422, code="invalid")
    return found.id


def add_user(db, settings, *, username: str, password: str, role: str, email: str = "",
             site: str | int | None = None, hashing: PasswordHashing | None = None,
             actor: str = "cli") -> dict:
    if role not in ROLES:
        raise UserError(f"role {role!r} is not one of {', '.join(ROLES)}", field="role")
    check_name(username, "username")
    email = check_email(email)
    password_rule(password, username)
    hashing = hashing or PasswordHashing(settings)
    with db.unit_of_work() as s:
        if s.scalar(select(User.id).where(User.username == username)) is not None:
            raise Conflict(f"user {username!r} already exists", field="username")
        user = User(username=username, email=email, password_hash=hashing.hash(password), role=role,
                    site_id=find_site_id(s, site))
        s.add(user)
        s.flush()
        out = _user_dict(user)
        audit.record(s, actor=actor, action="create", target="user", target_id=user.id, user=out)
        return out


def list_users(db) -> list[dict]:
    with db.read() as s:
        return [_user_dict(u) for u in s.scalars(select(User).order_by(User.username))]


KEEP = object()  # set_user: leave the site limit as it is


def set_user(db, user_id: int, *, role: str | None = None, active: bool | None = None,
             site: object = KEEP, actor: str = "cli") -> dict:
    """Change the role, deactivate (ends the user's sessions) or change the site limit (``site``: an id
    or a name, None for every site; takes effect on the user's next request)."""
    with db.unit_of_work() as s:
        user = s.get(User, user_id)
        if user is None:
            raise NotFound(f"no user {user_id}", field="user_id")
        if role is not None:
            if role not in ROLES:
                raise UserError(f"role {role!r} is not one of {', '.join(ROLES)}", field="role")
            user.role = role
        if active is not None:
            user.active = active
            if not active:
                s.execute(delete(UserSession).where(UserSession.user_id == user.id))
        changes: dict = {"role": role, "active": active}
        if site is not KEEP:
            user.site_id = find_site_id(s, site)  # type: ignore[arg-type]
            changes["site_id"] = user.site_id
        audit.record(s, actor=actor, action="update", target="user", target_id=user.id, **changes)
        return _user_dict(user)


def login(db, hashing: PasswordHashing, settings, username: str, password: str) -> tuple[str, str, dict]:
    """Check the password; return (session token, csrf token, user). Same answer for unknown users."""
    with db.read() as s:
        user = s.scalar(select(User).where(User.username == username))
    ok = hashing.verify(user.password_hash if user else None, password)
    if not ok or user is None or not user.active:
        raise Unauthorized("wrong user name or password", field="password")
    token, csrf = secrets.token_urlsafe(32), secrets.token_urlsafe(24)
    now = utcnow()
    with db.unit_of_work() as s:
        s.execute(delete(UserSession).where(UserSession.expires_at < now))
        s.add(UserSession(token_hash=token_hash(token), csrf_token=csrf, user_id=user.id, created_at=now,
                          expires_at=now + dt.timedelta(hours=settings.session_ttl_h)))
    return token, csrf, _user_dict(user)


def logout(db, token: str | None) -> None:
    if token:
        with db.unit_of_work() as s:
            s.execute(delete(UserSession).where(UserSession.token_hash == token_hash(token)))


def _key_dict(k: ApiKey) -> dict:
    def iso(t):
        return t.isoformat() if t else None

    return {"id": k.id, "prefix": k.prefix, "name": k.name, "role": k.role, "site_id": k.site_id,
            "created_by": k.created_by, "created_at": iso(k.created_at), "last_used_at": iso(k.last_used_at),
            "revoked_at": iso(k.revoked_at)}


def create_api_key(db, *, name: str, role: str = "technician", site: str | int | None = None,
                   created_by: str = "") -> tuple[str, dict]:
    """Create a key; returns (the full key — shown once, never stored —, its public description)."""
    if role not in ROLES:
        raise UserError(f"role {role!r} is not one of {', '.join(ROLES)}", field="role")
    check_name(name, "name")
    key, prefix, digest = new_api_key()
    with db.unit_of_work() as s:
        site_id = find_site_id(s, site)
        row = ApiKey(prefix=prefix, key_hash=digest, name=name, role=role, site_id=site_id,
                     created_by=created_by)
        s.add(row)
        s.flush()
        info = _key_dict(row)  # the public description only: never the key
        audit.record(s, actor=created_by, action="create", target="api_key", target_id=row.id, api_key=info)
        return key, info


def list_api_keys(db) -> list[dict]:
    with db.read() as s:
        return [_key_dict(k) for k in s.scalars(select(ApiKey).order_by(ApiKey.id))]


def revoke_api_key(db, key_id: int, *, actor: str = "cli") -> dict:
    with db.unit_of_work() as s:
        row = s.get(ApiKey, key_id)
        if row is None:
            raise NotFound(f"no API key {key_id}", field="key_id")
        if row.revoked_at is None:
            row.revoked_at = utcnow()
            audit.record(s, actor=actor, action="revoke", target="api_key", target_id=row.id,
                         prefix=row.prefix)
        out = _key_dict(row)
    cache = getattr(db, "key_cache", None)  # this process forgets it at once; others within api_key_cache_s
    if cache is not None:
        cache.forget(key_id)
    return out
