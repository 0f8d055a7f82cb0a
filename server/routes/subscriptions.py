"""Alert-email subscriptions under /api/v1/alarms/subscriptions.

Anyone logged in may subscribe their own address; engineers and admins may subscribe any address
(a planner without an account, a shared mailbox) and see or end every subscription. A caller limited to
one site subscribes only to that site (or its areas and assets), and sees or ends only the
subscriptions whose scope lies in it (``server.services.access``).
"""

from __future__ import annotations

from typing import Annotated, Literal

from fastapi import APIRouter, Depends, Path, Request
from pydantic import BaseModel, Field

from server.alarms import service
from server.errors import Forbidden
from server.routes.alarms import Id, call
from server.security import Principal, require_role
from server.services import access
from server.storage.tables import User

router = APIRouter(prefix="/api/v1/alarms/subscriptions", tags=["alarms"])


class SubscriptionIn(BaseModel):
    email: str | None = Field(None, description="address; your own when left out")
    scope: Literal["site", "area", "asset"]
    scope_id: Id
    min_level: Literal["alert", "danger"] = "alert"
    mode: Literal["immediate", "digest"] = "immediate"
    digest_time: str = Field("07:00", description="local time of the daily digest, HH:MM")
    timezone: str = Field("UTC", description="IANA time zone of digest_time, e.g. Europe/Berlin")
    include_data_quality: bool = False


def _own_email(request: Request, principal: Principal) -> str | None:
    if principal.kind != "user":
        return None
    with request.app.state.db.read() as s:
        user = s.get(User, principal.id)
        return (user.email or "").strip().lower() or None if user else None


def _in_scope(request: Request, principal: Principal, subs: list[dict]) -> list[dict]:
    """Only the subscriptions whose scope lies in the caller's site (all for an unlimited caller)."""
    if principal.site_id is None:
        return subs
    from sqlalchemy import select

    from server.alarms.tables import AlarmSubscription

    with request.app.state.db.read() as s:
        mine = set(s.scalars(select(AlarmSubscription.id)
                             .where(access.subscriptions_condition(principal.site_id))))
    return [x for x in subs if x["id"] in mine]


@router.get("", summary="Subscriptions: your own, or all of them for engineers")
def list_subscriptions(request: Request, principal: Principal = Depends(require_role("viewer"))):
    db = request.app.state.db
    if principal.has_role("engineer"):
        return {"ok": True, "subscriptions": _in_scope(request, principal, service.list_subscriptions(db))}
    own = _own_email(request, principal)
    subs = service.list_subscriptions(db, email=own) if own else []
    return {"ok": True, "subscriptions": _in_scope(request, principal, subs)}


@router.post("", status_code=201, summary="Subscribe an address to a site, area or asset")
def create_subscription(request: Request, body: SubscriptionIn,
                        principal: Principal = Depends(require_role("viewer"))):
    data = body.model_dump()
    own = _own_email(request, principal)
    if not data["email"]:
        if not own:
            raise Forbidden("email: your account has no email address; give one", field="email")
        data["email"] = own
    elif data["email"].strip().lower() != own and not principal.has_role("engineer"):
        raise Forbidden("email: only engineers may subscribe an address other than their own", field="email")
    if principal.site_id is not None:
        with request.app.state.db.read() as s:
            site = access.scope_site_id(s, data["scope"], data["scope_id"])
        if site is not None:  # a scope that does not exist is the service's 422
            access.check_site(principal, site, what=f"{data['scope']} {data['scope_id']}", field="scope_id")
    sub = call(service.create_subscription, request.app.state.db, data, actor=principal.name)
    return {"ok": True, "subscription": sub}


@router.delete("/{sub_id}", summary="End a subscription (your own, or any for engineers)")
def delete_subscription(request: Request, sub_id: Annotated[int, Path(ge=1, le=2**63 - 1)],
                        principal: Principal = Depends(require_role("viewer"))):
    db = request.app.state.db
    if principal.site_id is not None:
        with db.read() as s:
            site = access.subscription_site_id(s, sub_id)
        if site is not None:
            access.check_site(principal, site, what=f"subscription {sub_id}", field="sub_id")
    if not principal.has_role("engineer"):
        own = _own_email(request, principal)
        mine = {s["id"] for s in service.list_subscriptions(db, email=own)} if own else set()
        if sub_id not in mine:
            raise Forbidden(f"subscription {sub_id} is not yours", field="sub_id")
    call(service.delete_subscription, db, sub_id, actor=principal.label)
    return {"ok": True}

