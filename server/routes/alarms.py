"""Alarm API under /api/v1/alarms: open alarms, history, data quality, acknowledge, shelve, rules."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Literal

from fastapi import APIRouter, Depends, Path, Query, Request
from pydantic import BaseModel, Field

from server.alarms import incident_actions, service
from server.errors import AppError, Forbidden, NotFound
from server.security import Principal, require_role
from server.services import access

router = APIRouter(prefix="/api/v1/alarms", tags=["alarms"])

Level = Literal["alert", "danger"]
MAX_ID = 2**63 - 1
Id = Annotated[int, Field(ge=1, le=MAX_ID)]
IdQ = Annotated[int | None, Query(ge=1, le=MAX_ID)]
AlarmId = Annotated[int, Path(ge=1, le=MAX_ID, description="id of the alarm (its state row)")]
MachineId = Annotated[int, Path(ge=1, le=MAX_ID,
                                description="id of the machine (asset): a machine has one open incident")]


def call(fn, *args, **kwargs):
    """Run a service call, turning its input errors into the one API error shape."""
    try:
        return fn(*args, **kwargs)
    except service.AlarmInputError as exc:
        raise AppError(str(exc), field=exc.field, status=exc.status,
                       code="conflict" if exc.status == 409 else "invalid") from None
    except service.AlarmNotFound as exc:
        raise NotFound(str(exc), field=exc.field) from None


def _site_scope(principal: Principal, site_id: int | None) -> int | None:
    if principal.site_id is None:
        return site_id
    if site_id is not None and site_id != principal.site_id:
        raise Forbidden(f"site {site_id} is outside the site this key is limited to", field="site_id")
    return principal.site_id


class AckIn(BaseModel):
    comment: str = Field(min_length=1, max_length=2000, description="what is being done about it")


class ShelveIn(BaseModel):
    until: dt.datetime = Field(description="end of the shelving, with a time zone (ISO 8601)")
    reason: str = Field(min_length=1, max_length=2000)


class RuleIn(BaseModel):
    point_id: Id | None = None
    asset_id: Id | None = None
    metric: str = Field(max_length=40)
    alert: float | None = Field(None, allow_inf_nan=False)
    danger: float | None = Field(None, allow_inf_nan=False)
    direction: Literal["above", "below"] | None = None
    zone_based: bool = False
    k: int = Field(2, ge=1, le=50)
    n: int = Field(3, ge=1, le=50)
    hysteresis: float = Field(0.1, ge=0, lt=1)
    enabled: bool = True


@router.get("", summary="Open alarms (active, acknowledged, shelved or all), most severe first")
def list_alarms(request: Request, view: Literal["active", "acknowledged", "shelved", "all"] = "active",
                site_id: IdQ = None, area_id: IdQ = None, asset_id: IdQ = None,
                level: Level | None = None, principal: Principal = Depends(require_role("viewer"))):
    alarms = call(service.list_alarms, request.app.state.db, view=view,
                  site_id=_site_scope(principal, site_id), area_id=area_id, asset_id=asset_id, level=level)
    return {"ok": True, "view": view, "alarms": alarms}


@router.get("/incidents", summary="Open alarms grouped per machine into incidents, worst machine first")
def list_incidents(request: Request, view: Literal["active", "acknowledged", "shelved", "all"] = "active",
                   site_id: IdQ = None, area_id: IdQ = None, asset_id: IdQ = None,
                   level: Level | None = None, principal: Principal = Depends(require_role("viewer"))):
    incidents = call(incident_actions.list_incidents, request.app.state.db, view=view,
                     site_id=_site_scope(principal, site_id), area_id=area_id, asset_id=asset_id, level=level)
    return {"ok": True, "view": view, "incidents": incidents}


@router.get("/history", summary="The audit trail of transitions, acknowledgements and shelving")
def history(request: Request, site_id: IdQ = None, area_id: IdQ = None,
            asset_id: IdQ = None, point_id: IdQ = None, level: Level | None = None,
            kind: Literal["transition", "data-quality", "acknowledged", "shelved", "unshelved"] | None = None,
            limit: int = Query(200, ge=1, le=1000), before_id: IdQ = None,
            principal: Principal = Depends(require_role("viewer"))):
    if kind == "data-quality" and not principal.has_role("engineer"):
        raise Forbidden("data-quality events are shown to engineers; you are " + principal.role, field="kind")
    events = call(service.history, request.app.state.db, site_id=_site_scope(principal, site_id),
                  area_id=area_id, asset_id=asset_id, point_id=point_id, level=level, kind=kind, limit=limit,
                  before_id=before_id)
    if not principal.has_role("engineer"):
        events = [e for e in events if e["kind"] != "data-quality"]
    return {"ok": True, "events": events}


@router.get("/data-quality", summary="Points whose latest record was a data-quality problem (engineers)")
def data_quality(request: Request, site_id: IdQ = None,
                 principal: Principal = Depends(require_role("engineer"))):
    return {"ok": True, "points": service.open_data_quality(request.app.state.db,
                                                            site_id=_site_scope(principal, site_id))}


def _check_site(request: Request, principal: Principal, kind: str, obj_id: int, field: str) -> None:
    """403 for another site's object (a missing one is left to the service's 404)."""
    if principal.site_id is None:
        return
    with request.app.state.db.read() as s:
        try:
            access.check(s, principal, kind, obj_id, field=field)
        except NotFound:
            return


def _check_state_site(request: Request, principal: Principal, state_id: int) -> None:
    _check_site(request, principal, "alarm", state_id, "alarm_id")


@router.get("/outbox", summary="Recent alert emails and their delivery state (admin)")
def outbox(request: Request, status: Literal["pending", "sending", "sent", "failed"] | None = None,
           limit: int = Query(100, ge=1, le=1000), principal: Principal = Depends(require_role("admin"))):
    if principal.site_id is not None:
        raise Forbidden("the outbox lists the emails of every site; a key limited to one site cannot read "
                        "it (use an admin login or an unlimited admin key)", field="site_id")
    return {"ok": True, "emails": call(service.outbox_list, request.app.state.db, status=status, limit=limit)}


@router.post("/incidents/{asset_id}/acknowledge",
             summary="Acknowledge every open alarm of a machine with one comment (engineer)")
def acknowledge_incident(request: Request, asset_id: MachineId, body: AckIn,
                         principal: Principal = Depends(require_role("engineer"))):
    _check_site(request, principal, "asset", asset_id, "asset_id")
    return {"ok": True, **call(incident_actions.acknowledge_incident, request.app.state.db, asset_id,
                               actor=principal.name, comment=body.comment)}


@router.post("/incidents/{asset_id}/shelve",
             summary="Shelve every open alarm of a machine until a time, with a reason (engineer)")
def shelve_incident(request: Request, asset_id: MachineId, body: ShelveIn,
                    principal: Principal = Depends(require_role("engineer"))):
    _check_site(request, principal, "asset", asset_id, "asset_id")
    return {"ok": True, **call(incident_actions.shelve_incident, request.app.state.db, asset_id,
                               actor=principal.name, until=body.until, reason=body.reason)}


@router.post("/incidents/{asset_id}/unshelve",
             summary="End the shelving of a machine's alarms now (engineer)")
def unshelve_incident(request: Request, asset_id: MachineId,
                      principal: Principal = Depends(require_role("engineer"))):
    _check_site(request, principal, "asset", asset_id, "asset_id")
    return {"ok": True, **call(incident_actions.unshelve_incident, request.app.state.db, asset_id,
                               actor=principal.name)}


@router.post("/{alarm_id}/acknowledge", summary="Acknowledge an open alarm with a comment (engineer)")
def acknowledge(request: Request, alarm_id: AlarmId, body: AckIn,
                principal: Principal = Depends(require_role("engineer"))):
    _check_state_site(request, principal, alarm_id)
    event = call(service.acknowledge, request.app.state.db, alarm_id, actor=principal.name,
                 comment=body.comment)
    return {"ok": True, "event": event}


@router.post("/{alarm_id}/shelve", summary="Shelve an open alarm until a date, with a reason (engineer)")
def shelve(request: Request, alarm_id: AlarmId, body: ShelveIn,
           principal: Principal = Depends(require_role("engineer"))):
    _check_state_site(request, principal, alarm_id)
    event = call(service.shelve, request.app.state.db, alarm_id, actor=principal.name, until=body.until,
                 reason=body.reason)
    return {"ok": True, "event": event}


@router.post("/{alarm_id}/unshelve", summary="End the shelving of an alarm now (engineer)")
def unshelve(request: Request, alarm_id: AlarmId, principal: Principal = Depends(require_role("engineer"))):
    _check_state_site(request, principal, alarm_id)
    return {"ok": True, "event": call(service.unshelve, request.app.state.db, alarm_id, actor=principal.name)}


@router.get("/rules", summary="The rules in force at a measurement point (defaults included)")
def rules(request: Request, point_id: Annotated[int, Query(ge=1, le=MAX_ID)],
          principal: Principal = Depends(require_role("viewer"))):
    _check_site(request, principal, "point", point_id, "point_id")
    return {"ok": True, "rules": call(service.list_rules, request.app.state.db, point_id=point_id)}


@router.put("/rules", summary="Set the rule for one metric on a point or an asset (engineer)")
def set_rule(request: Request, body: RuleIn, principal: Principal = Depends(require_role("engineer"))):
    data = body.model_dump(exclude_none=True)
    if body.point_id is not None:
        _check_site(request, principal, "point", body.point_id, "point_id")
    if body.asset_id is not None:
        _check_site(request, principal, "asset", body.asset_id, "asset_id")
    return {"ok": True, "rule": call(service.set_rule, request.app.state.db, data, actor=principal.name)}
