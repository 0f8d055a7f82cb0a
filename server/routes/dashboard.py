"""JSON helpers the dashboard pages need beyond the general API (``/api/v1/dashboard/...``).

Each answer gathers what one page shows in one request: the plant overview with alarm levels and small
trends, an asset with its points and limits, a point's chart series (bucketed on the server), the
operating window of a point, and one record with its context. All reads; viewers may call them.
"""

from __future__ import annotations

import datetime as dt

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import JSONResponse
from pydantic import AwareDatetime
from sqlalchemy import select

from server.alarms.rules import LEVEL_RANK, zone_limits
from server.errors import AppError, NotFound
from server.routes import dashboard_series as series
from server.security import Principal, require_role
from server.services.access import check_point, check_record
from server.storage import queries
from server.storage import tree as tree_queries
from server.storage.tables import Area, Asset, Point, Record, Result, Site

router = APIRouter(prefix="/api/v1/dashboard", tags=["dashboard"])
viewer = require_role("viewer")
ZONES = ("A", "B", "C", "D")


def site_zone(settings, site_name: str) -> str:
    return settings.site_timezones.get(site_name, settings.site_timezone)


def _alarms_by_asset(db, site_scope):
    from server.alarms import service

    out: dict[int, list[dict]] = {}
    for a in service.list_alarms(db, view="all", site_id=site_scope):
        out.setdefault(a["asset_id"], []).append(a)
    return out


def _alarm_summary(alarms: list[dict]) -> dict:
    worst = max((a["level"] for a in alarms), key=LEVEL_RANK.get, default="normal")
    return {"level": worst,
            "active": sum(1 for a in alarms if not a["acknowledged"] and not a["shelved"]),
            "acknowledged": sum(1 for a in alarms if a["acknowledged"] and not a["shelved"]),
            "shelved": sum(1 for a in alarms if a["shelved"])}


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
                             zone=max(zones, default=None), spark=sparks.get(asset["id"], []),
                             states=sorted({p["state"] for p in pts}))
    overdue = [{"route_id": r["id"], "route": r["name"], **st} for r in due["routes"] for st in r["stops"]
               if st["status"] in ("due", "overdue")]
    return {"ok": True, "now": due["now"], "simulated": settings.simulated_data, "sites": tree["sites"],
            "spark_days": 30, "routes": [{k: r[k] for k in ("id", "name", "site_id", "counts")}
                                         for r in due["routes"]], "due_points": overdue}


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


def _asset_context(s, principal: Principal, asset_id: int):
    row = s.execute(select(Asset, Area, Site).join(Area, Area.id == Asset.area_id)
                    .join(Site, Site.id == Area.site_id).where(Asset.id == asset_id)).first()
    if row is None:
        raise NotFound(f"no asset {asset_id}; see the plant overview", field="asset_id")
    asset, area, site = row
    if not principal.may_access_site(site.id):
        from server.errors import Forbidden

        raise Forbidden(f"asset {asset_id} is outside the site this key is limited to", field="asset_id")
    return asset, area, site


def _asset_dict(asset: Asset, area: Area, site: Site, settings) -> dict:
    return {"id": asset.id, "name": asset.name, "kind": asset.kind, "area": area.name, "area_id": area.id,
            "site": site.name, "site_id": site.id, "timezone": site_zone(settings, site.name),
            "nominal_speed_hz": asset.nominal_speed_hz, "machine_group": asset.machine_group,
            "foundation": asset.foundation, "forcing_kind": asset.forcing_kind,
            "forcing_multiplier": asset.forcing_multiplier, "rated_power_kw": asset.rated_power_kw,
            "description": asset.description}


LEVEL_METRICS = ("half_order_velocity", "half_order_ratio", "growth_rate", "overall_velocity")


def point_levels(s, asset: Asset, point_ids: list[int]) -> dict[int, dict]:
    """Alert/danger levels in force per point, read in one query and never written (a GET): a point's own
    edited rule wins, then an asset rule, then the point's default rule or the default set."""
    from server.alarms.rules import default_rules
    from server.alarms.tables import AlarmRule

    rows = list(s.scalars(select(AlarmRule).where(AlarmRule.point_id.in_(point_ids)
                                                  | ((AlarmRule.asset_id == asset.id)
                                                     & AlarmRule.point_id.is_(None)))))
    defaults = {r.metric: r for r in default_rules(group=asset.machine_group or 2,
                                                   support=asset.foundation or "rigid")}
    asset_rules = {r.metric: r for r in rows if r.point_id is None}

    def level(pid: int, metric: str) -> dict | None:
        own = next((r for r in rows if r.point_id == pid and r.metric == metric), None)
        if own is not None and (not own.is_default or metric not in asset_rules):
            r = own
        elif metric in asset_rules:
            r = asset_rules[metric]
        else:
            spec = defaults.get(metric)
            return None if spec is None else {"alert": spec.alert, "danger": spec.danger,
                                              "zone_based": spec.zone_based}
        if not r.enabled:
            return None
        return {"alert": r.alert_level, "danger": r.danger_level, "zone_based": r.zone_based}

    return {pid: {m: level(pid, m) for m in LEVEL_METRICS} for pid in point_ids}


@router.get("/assets/{asset_id}", summary="An asset with its points, ISO zone limits and alarm levels")
def asset_detail(request: Request, asset_id: int, principal: Principal = Depends(viewer)):
    from server.alarms import service

    db, settings = request.app.state.db, request.app.state.settings
    with db.read() as s:
        asset, area, site = _asset_context(s, principal, asset_id)
        tree = tree_queries.tree(s, site.id)
        pts = next(a["points"] for ar in tree["sites"][0]["areas"] for a in ar["assets"]
                   if a["id"] == asset_id)
        levels = point_levels(s, asset, [p["id"] for p in pts])
    limits = zone_limits({}, group=asset.machine_group, support=asset.foundation)
    for p in pts:
        p["levels"] = levels[p["id"]]
    alarms = service.list_alarms(db, view="all", asset_id=asset_id)
    return {"ok": True, "asset": _asset_dict(asset, area, site, settings), "points": pts,
            "zone_limits_mm_s": list(limits) if limits else None, "alarms": alarms,
            "alarm_summary": _alarm_summary(alarms), "series": series.SERIES}


def _period(start, end, default_days: float) -> tuple[dt.datetime, dt.datetime]:
    end = end or dt.datetime.now(dt.UTC)
    start = start or end - dt.timedelta(days=default_days)
    if end <= start:
        raise AppError("end must be after start", field="end")
    return start, end


@router.get("/points/{point_id}/series", summary="Chart series of a point, bucketed to <= max_points")
def point_series(request: Request, point_id: int,
                 start: AwareDatetime | None = Query(None, description="default: 30 days before end"),
                 end: AwareDatetime | None = Query(None, description="default: now"),
                 max_points: int = Query(600, ge=10, le=5000),
                 limit: float | None = Query(None, gt=0, description="level for the forecast, mm/s; default: "
                                             "the point's half-order danger level"),
                 principal: Principal = Depends(viewer)):
    start, end = _period(start, end, 30)
    with request.app.state.db.read() as s:
        check_point(s, principal, point_id)
        if limit is None:
            point = s.get(Point, point_id)
            level = point_levels(s, point.asset, [point_id])[point_id]["half_order_velocity"]
            limit = level["danger"] if level and level["danger"] else None
        data = series.point_series(s, point_id, start, end, max_points)
    fit = series.trend_forecast(data, limit)
    # a plain JSONResponse: thousands of floats need no jsonable_encoder walk
    return JSONResponse({"ok": True, "point_id": point_id, "start": queries.iso(start),
                         "end": queries.iso(end), "max_points": max_points, **data, "trend": fit})


@router.get("/records/{record_id}", summary="One record with its point, asset, site time zone and result")
def record_bundle(request: Request, record_id: int, principal: Principal = Depends(viewer)):
    settings = request.app.state.settings
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
        detail = queries.record_detail(s, record_id)
        rec = s.get(Record, record_id)
        point = s.get(Point, rec.point_id)
        asset, area, site = _asset_context(s, principal, point.asset_id)
        newer = s.scalar(select(Record.id).where(Record.point_id == point.id,
                                                 Record.measured_at > rec.measured_at)
                         .order_by(Record.measured_at).limit(1))
        older = s.scalar(select(Record.id).where(Record.point_id == point.id,
                                                 Record.measured_at < rec.measured_at)
                         .order_by(Record.measured_at.desc()).limit(1))
    return {**detail, "point": {"id": point.id, "name": point.name, "location": point.location,
                                "direction": point.direction, "units": point.units},
            "asset": _asset_dict(asset, area, site, settings), "newer_id": newer, "older_id": older}


@router.get("/points/{point_id}/window", summary="Readings in (forcing frequency, 1X amplitude) and the fit")
def operating_window(request: Request, point_id: int,
                     start: AwareDatetime | None = Query(None, description="default: 365 days before end"),
                     end: AwareDatetime | None = Query(None),
                     max_readings: int = Query(3000, ge=10, le=20000),
                     principal: Principal = Depends(viewer)):
    from server.routes.dashboard_window import window_answer

    start, end = _period(start, end, 365)
    settings = request.app.state.settings
    with request.app.state.db.read() as s:
        check_point(s, principal, point_id)
        point = s.get(Point, point_id)
        asset, area, site = _asset_context(s, principal, point.asset_id)
        cols = (Result.measured_ts, Result.forcing_hz,
                series.json_number(s.bind.dialect.name, "orders", "1X", "amplitude"), Result.sub_detected,
                Result.sub_class, Result.growth_rate_per_s, Result.sub_amplitude, Result.record_id)
        rows = s.execute(select(*cols).where(Result.point_id == point_id, Result.current.is_(True),
                                             Result.measured_ts >= start.timestamp(),
                                             Result.measured_ts <= end.timestamp())
                         .order_by(Result.measured_ts.desc()).limit(max_readings)).all()
    rows.reverse()
    return JSONResponse({"ok": True, "point": {"id": point.id, "name": point.name, "units": point.units},
                         "asset": _asset_dict(asset, area, site, settings), **window_answer(rows)})
