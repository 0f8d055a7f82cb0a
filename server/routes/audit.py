"""Audit and exports: the configuration audit trail (JSON and CSV) and the alarm history as CSV.

CSV cells that a spreadsheet would run as a formula (= + - @ ...) are written with a leading quote
(``server.audit.csv_cell``), so exported comments and names cannot inject formulas.
"""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import Response
from sqlalchemy import select

from server import audit
from server.alarms import service
from server.audit.tables import ConfigChange
from server.errors import Forbidden
from server.security import Principal, require_role
from server.services import access

router = APIRouter(prefix="/api/v1", tags=["audit"])
AUDIT_COLUMNS = ["id", "created_at", "actor", "action", "target", "target_id", "details"]
HISTORY_COLUMNS = ["id", "created_at", "kind", "site_id", "area_id", "asset_id", "point_id", "where",
                   "metric", "from_level", "to_level", "value", "threshold", "record_id", "actor", "comment",
                   "summary"]


def _changes(request: Request, principal: Principal, target: str | None, limit: int,
             before_id: int | None) -> list[dict]:
    """Newest first; a caller limited to one site sees only changes of that site's objects."""
    stmt = select(ConfigChange).order_by(ConfigChange.id.desc()).limit(limit)
    scope = access.audit_condition(principal.site_id)
    if scope is not None:
        stmt = stmt.where(scope)
    if target is not None:
        stmt = stmt.where(ConfigChange.target == target)
    if before_id is not None:
        stmt = stmt.where(ConfigChange.id < before_id)
    with request.app.state.db.read() as s:
        return [{"id": c.id, "created_at": c.created_at.isoformat(), "actor": c.actor, "action": c.action,
                 "target": c.target, "target_id": c.target_id, "details": c.details} for c in s.scalars(stmt)]


def _csv(text: str, name: str) -> Response:
    return Response(text, media_type="text/csv; charset=utf-8",
                    headers={"Content-Disposition": f'attachment; filename="{name}"'})


@router.get("/audit", summary="Configuration changes (rules, assets, users, keys, subscriptions), newest 1st")
def list_changes(request: Request, target: str | None = Query(None, max_length=40),
                 limit: int = Query(200, ge=1, le=1000),
                 before_id: int | None = Query(None, ge=1, le=2**63 - 1),
                 principal: Principal = Depends(require_role("engineer"))):
    return {"ok": True, "changes": _changes(request, principal, target, limit, before_id)}


@router.get("/audit.csv", summary="Configuration changes as CSV (formula-safe)",
            response_class=Response, responses={200: {"content": {"text/csv": {}}}})
def export_changes(request: Request, target: str | None = Query(None, max_length=40),
                   limit: int = Query(1000, ge=1, le=1000),
                   principal: Principal = Depends(require_role("engineer"))):
    rows = _changes(request, principal, target, limit, None)
    return _csv(audit.to_csv(AUDIT_COLUMNS, [[r[c] if c != "details" else _flat(r[c]) for c in AUDIT_COLUMNS]
                                             for r in rows]), "halfwatch-config-changes.csv")


@router.get("/alarms/history.csv", summary="The alarm history (transitions, acknowledgements) as CSV",
            response_class=Response, responses={200: {"content": {"text/csv": {}}}})
def export_history(request: Request, site_id: int | None = Query(None, ge=1, le=2**63 - 1),
                   point_id: int | None = Query(None, ge=1, le=2**63 - 1),
                   limit: int = Query(1000, ge=1, le=1000),
                   principal: Principal = Depends(require_role("viewer"))):
    if principal.site_id is not None:
        if site_id is not None and site_id != principal.site_id:
            raise Forbidden(f"site {site_id} is outside the site this key is limited to", field="site_id")
        site_id = principal.site_id
    events = service.history(request.app.state.db, site_id=site_id, point_id=point_id, limit=limit)
    if not principal.has_role("engineer"):
        events = [e for e in events if e["kind"] != "data-quality"]
    return _csv(audit.to_csv(HISTORY_COLUMNS, [[_where_words(e.get(c)) if c == "where" else e.get(c)
                                                for c in HISTORY_COLUMNS] for e in events]),
                "halfwatch-alarm-history.csv")


def _where_words(where: dict | None) -> str:
    """E.g. "Riverside works / Cooling water / CW pump 1 / P1-DE-H" (site / area / machine / point)."""
    if not where:
        return ""
    return " / ".join(str(where[k]) for k in ("site", "area", "asset", "point") if where.get(k))


def _flat(details: dict) -> str:
    import json

    return json.dumps(details, sort_keys=True, ensure_ascii=False)
