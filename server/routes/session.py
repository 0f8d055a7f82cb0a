"""Login, logout and who-am-I (``/api/v1/session``, ``/api/v1/me``)."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool

from server.schemas import LoginBody
from server.security import (
    CSRF_COOKIE,
    SESSION_COOKIE,
    Principal,
    optional_principal,
    require_role,
    session_token,
    sign_session,
)
from server.services import users

router = APIRouter(prefix="/api/v1", tags=["session"])


def _me(p: Principal) -> dict:
    return {"ok": True, "kind": p.kind, "id": p.id, "name": p.name, "role": p.role, "site_id": p.site_id,
            "csrf_token": p.csrf_token}


@router.post("/session", summary="Log in (JSON or form: username, password); sets the session cookie",
             openapi_extra={"requestBody": {"content": {
                 "application/json": {"schema": LoginBody.model_json_schema()},
                 "application/x-www-form-urlencoded": {"schema": LoginBody.model_json_schema()}}}})
async def login(request: Request):
    try:
        if request.headers.get("content-type", "").startswith("application/json"):
            body = LoginBody.model_validate_json(await request.body())
        else:
            form = await request.form()
            body = LoginBody.model_validate({k: form.get(k) for k in ("username", "password")})
    except ValidationError as exc:
        raise RequestValidationError([{**e, "loc": ("body", *e["loc"])} for e in exc.errors()]) from None
    app = request.app
    throttle, slots = app.state.login_throttle, app.state.hash_slots
    keys = (f"user:{body.username.strip().lower()}", f"addr:{request.client.host if request.client else '-'}")

    def attempt():  # one thread hop: count, wait for a hash slot, check the password
        ids = throttle.begin(*keys)  # counted before hashing; 429 + Retry-After past the limit
        try:
            slots.acquire()  # 503 + Retry-After when every slot stays busy
        except Exception:
            throttle.release(ids)
            raise
        try:
            out = users.login(app.state.db, app.state.passwords, app.state.settings, body.username,
                              body.password)  # Unauthorized: the attempt stays counted
        finally:
            slots.release()
        throttle.succeeded(ids, keys[0])
        return out

    token, csrf, user = await run_in_threadpool(attempt)
    settings = app.state.settings
    resp = JSONResponse({"ok": True, "user": user, "csrf_token": csrf})
    max_age = int(settings.session_ttl_h * 3600)
    resp.set_cookie(SESSION_COOKIE, sign_session(app.state.signing_key, token), max_age=max_age,
                    httponly=True, samesite="lax", secure=settings.session_cookie_secure, path="/")
    resp.set_cookie(CSRF_COOKIE, csrf, max_age=max_age, httponly=False, samesite="lax",
                    secure=settings.session_cookie_secure, path="/")
    return resp


@router.delete("/session", summary="Log out")
def logout(request: Request):
    principal = optional_principal(request)
    if principal is not None and principal.via_cookie:
        sent = request.headers.get("x-csrf-token")
        if sent != principal.csrf_token:
            from server.errors import Forbidden

            raise Forbidden("missing or wrong CSRF token; send the X-CSRF-Token header", field="X-CSRF-Token")
    users.logout(request.app.state.db, session_token(request))
    resp = JSONResponse({"ok": True})
    resp.delete_cookie(SESSION_COOKIE, path="/")
    resp.delete_cookie(CSRF_COOKIE, path="/")
    return resp


@router.get("/me", summary="The caller: user or API key, role, CSRF token")
def me(principal: Principal = Depends(require_role("viewer"))):
    return _me(principal)
