"""Users and API keys (admin).

A user may be limited to one site (``site_id``), as a key may; managing users still needs a caller who
is not limited to a site (a limited admin could otherwise widen a user's reach). A key limited to a site
lists, creates and revokes only keys limited to its own site (never an unlimited key: that would
widen its own reach).
"""

from __future__ import annotations

from typing import Literal

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse
from pydantic import BaseModel, ConfigDict, Field

from server.errors import Forbidden
from server.schemas import ApiKeyIn, UserIn
from server.security import Principal, require_role
from server.services import access, users

router = APIRouter(prefix="/api/v1", tags=["admin"])
admin = require_role("admin")


def user_admin(principal: Principal = Depends(admin)) -> Principal:
    """Managing users needs an admin who is not limited to one site."""
    if principal.site_id is not None:
        raise Forbidden("users may be given any site; a caller limited to one site cannot list or manage "
                        "them (use an admin login or an admin key not limited to a site)", field="site_id")
    return principal


class UserPatch(BaseModel):
    model_config = ConfigDict(extra="forbid")
    role: Literal["viewer", "technician", "engineer", "admin"] | None = None
    active: bool | None = None
    site_id: int | None = Field(None, ge=1, le=2**63 - 1, strict=True,
                                description="limit the user to this site; null for every site "
                                "(leave the field out to keep the limit as it is)")


@router.get("/users", summary="List users (admin)")
def list_users(request: Request, principal: Principal = Depends(user_admin)):
    return {"ok": True, "users": users.list_users(request.app.state.db)}


@router.post("/users", status_code=201, summary="Add a user (admin)")
def add_user(request: Request, body: UserIn, principal: Principal = Depends(user_admin)):
    app = request.app
    user = users.add_user(app.state.db, app.state.settings, username=body.username, password=body.password,
                          role=body.role, email=body.email, site=body.site_id, hashing=app.state.passwords,
                          actor=principal.label)
    return JSONResponse({"ok": True, "user": user}, status_code=201)


@router.patch("/users/{user_id}", summary="Change a user's role or deactivate them (admin)")
def patch_user(request: Request, user_id: int, body: UserPatch, principal: Principal = Depends(user_admin)):
    site = body.site_id if "site_id" in body.model_fields_set else users.KEEP
    user = users.set_user(request.app.state.db, user_id, role=body.role, active=body.active, site=site,
                          actor=principal.label)
    return {"ok": True, "user": user}


@router.get("/apikeys", summary="List API keys, without the secrets (admin)")
def list_keys(request: Request, principal: Principal = Depends(admin)):
    keys = users.list_api_keys(request.app.state.db)
    if principal.site_id is not None:
        keys = [k for k in keys if k["site_id"] == principal.site_id]
    return {"ok": True, "api_keys": keys}


@router.post("/apikeys", status_code=201, summary="Create an API key; the key is shown only in this answer")
def create_key(request: Request, body: ApiKeyIn, principal: Principal = Depends(admin)):
    if principal.site_id is not None and body.site_id != principal.site_id:
        raise Forbidden(f"a key limited to site {principal.site_id} can only create keys limited to that "
                        "site; "
                        f"send site_id {principal.site_id}", field="site_id")
    key, info = users.create_api_key(request.app.state.db, name=body.name, role=body.role, site=body.site_id,
                                     created_by=principal.name)
    return JSONResponse({"ok": True, "key": key, "api_key": info}, status_code=201)


@router.delete("/apikeys/{key_id}", summary="Revoke an API key (admin)")
def revoke_key(request: Request, key_id: int, principal: Principal = Depends(admin)):
    if principal.site_id is not None:
        from server.storage.tables import ApiKey

        with request.app.state.db.read() as s:
            row = s.get(ApiKey, key_id)
        if row is not None and row.site_id != principal.site_id:
            raise access.outside(f"API key {key_id}", "key_id")
    return {"ok": True, "api_key": users.revoke_api_key(request.app.state.db, key_id, actor=principal.label)}
