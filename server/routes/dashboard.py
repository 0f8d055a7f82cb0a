"""JSON helpers the dashboard pages need beyond the general API (``/api/v1/dashboard/...``).

Each answer gathers what one page shows in one request: the plant overview with alarm levels and small
trends, an asset with its points and limits, a point's chart series (bucketed on the server), the
operating window of a point, and one record with its context. All reads; viewers may call them.
"""

from __future__ import annotations

import datetime as dt

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import JSONResponse
from sqlalchemy import select

from server.answers import SeriesAnswer, WindowAnswer
from server.security import Principal, require_role
from server.services import dashboard as dashboard_service
from server.services import plant_view, series
from server.storage import tree as tree_queries
from server.storage.tables import Area, Asset, Point, Site
from server.times import ApiTime

router = APIRouter(prefix="/api/v1/dashboard", tags=["dashboard"])
viewer = require_role("viewer")
ZONES = ("A", "B", "C", "D")


site_zone = dashboard_service.site_zone


def _alarms_by_asset(db, site_scope):
    from server.alarms import service

    out: dict[int, list[dict]] = {}
    for a in service.list_alarms(db, view="all", site_id=site_scope):
        out.setdefault(a["asset_id"], []).append(a)
    return out


_alarm_summary = dashboard_service.alarm_summary


@router.get("/overview", summary="Sites > areas > assets with worst alarm level, last reading, small trend")
def overview(request: Request, principal: Principal = Depends(viewer)):
    db, settings = request.app.state.db, request.app.state.settings
    alarms = _alarms_by_asset(db, principal.site_id)
    with db.read() as s:
        tree = tree_queries.tree(s, principal.site_id)
        points = list(s.scalars(select(Point).join(Asset).join(Area).where(
            Area.site_id.in_([x["id"] for x in tree["sites"]]))))
        sparks = series.asset_sparks(s, points)
        due = tree_queries.routes_due(s, principal.site_id)
    for site in tree["sites"]:
        site["timezone"] = site_zone(settings, site["name"])
        for area in site["areas"]:
            for asset in area["assets"]:
                pts = asset["points"]
                last = max((p["last_measured_at"] for p in pts if p["last_measured_at"]), default=None)
                zones = [p["latest"]["zone"] for p in pts if p["latest"] and p["latest"]["zone"] in ZONES]
                asset.update(alarms=_alarm_summary(alarms.get(asset["id"], [])), last_measured_at=last,
                             zone=max(zones, default=None),
                             spark_half_order_velocity_rms_mm_s=sparks.get(asset["id"], []),
                             states=sorted({p["state"] for p in pts}))
    with db.read() as s:  # plant page: staleness, sparkline levels, summary strip (services.plant_view)
        now = plant_view.parse(due["now"]) or dt.datetime.now(dt.UTC)
        counts = plant_view.decorate(s, tree["sites"], due["routes"], now,
                                     lambda s_, aid, ids: point_levels(s_, s_.get(Asset, aid), ids))
    overdue = [{"route_id": r["id"], "route": r["name"], **st} for r in due["routes"] for st in r["stops"]
               if st["status"] in ("due", "overdue")]
    return {"ok": True, "now": due["now"], "simulated": settings.simulated_data, "sites": tree["sites"],
            "summary": counts, "spark_days": 30,
            "routes": [{k: r[k] for k in ("id", "name", "site_id", "counts")} for r in due["routes"]],
            "due_points": overdue}


@router.get("/sites", summary="The sites the caller may see, with the time zone the dashboard shows")
def sites(request: Request, principal: Principal = Depends(viewer)):
    settings = request.app.state.settings
    q = select(Site).order_by(Site.name)
    if principal.site_id is not None:
        q = q.where(Site.id == principal.site_id)
    with request.app.state.db.read() as s:
        rows = list(s.scalars(q))
    return {"ok": True, "default_timezone": settings.site_timezone,
            "sites": [{"id": x.id, "name": x.name, "timezone": site_zone(settings, x.name)} for x in rows]}


_asset_context = dashboard_service.asset_context
_asset_dict = dashboard_service.asset_dict
LEVEL_METRICS = dashboard_service.LEVEL_METRICS
point_levels = dashboard_service.point_levels


@router.get("/assets/{asset_id}", summary="An asset with its points, ISO zone limits and alarm levels")
def asset_detail(request: Request, asset_id: int, principal: Principal = Depends(viewer)):
    return dashboard_service.asset_view(request.app.state.db, request.app.state.settings, principal, asset_id)


@router.get("/points/{point_id}/series", summary="Chart series of a point, bucketed to <= max_points",
            response_model=SeriesAnswer)
def point_series(request: Request, point_id: int,
                 start: ApiTime | None = Query(None, description="default: 30 days before end"),
                 end: ApiTime | None = Query(None, description="default: now"),
                 max_points: int = Query(600, ge=10, le=5000),
                 limit: float | None = Query(None, gt=0, description="level for the forecast, mm/s r.m.s.; "
                                             "default: the point's half-order danger level"),
                 principal: Principal = Depends(viewer)):
    data = dashboard_service.series_view(request.app.state.db, principal, point_id, start, end, max_points,
                                         limit)
    # a plain JSONResponse: thousands of floats need no jsonable_encoder walk
    return JSONResponse(data)


@router.get("/points/{point_id}/readings",
            summary="The newest readings of a point with their result (half-order r.m.s., class, zone, "
                    "growth)")
def point_readings(request: Request, point_id: int, limit: int = Query(15, ge=1, le=200),
                   principal: Principal = Depends(viewer)):
    return dashboard_service.readings_view(request.app.state.db, principal, point_id, limit)


@router.get("/records/{record_id}", summary="One record with its point, asset, site time zone and result")
def record_bundle(request: Request, record_id: int, principal: Principal = Depends(viewer)):
    return dashboard_service.record_view(request.app.state.db, request.app.state.settings, principal,
                                         record_id)


@router.get("/records/{record_id}/waterfall",
            summary="Up to n spectra of the record's point with this record in the middle, oldest first")
def record_waterfall(request: Request, record_id: int, n: int = Query(21, ge=1, le=200),
                     principal: Principal = Depends(viewer)):
    return JSONResponse(dashboard_service.waterfall_view(request.app.state.db, principal, record_id, n))


@router.get("/points/{point_id}/window",
            summary="Readings in (forcing frequency, 1X acceleration peak) and the fit",
            response_model=WindowAnswer)
def operating_window(request: Request, point_id: int,
                     start: ApiTime | None = Query(None, description="default: 365 days before end"),
                     end: ApiTime | None = Query(None),
                     max_readings: int = Query(3000, ge=10, le=20000),
                     principal: Principal = Depends(viewer)):
    return JSONResponse(dashboard_service.window_view(request.app.state.db, request.app.state.settings,
                                                      principal, point_id, start, end, max_readings))
