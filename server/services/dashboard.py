"""Dashboard reads: what one machine page, chart or reading page shows, gathered in one call.

The routes in server/routes/dashboard.py only parse the request and shape the answer; the reads,
the rule precedence (:func:`server.alarms.rules.rules_in_force`) and the window fit live here and in
:mod:`server.services.series` / :mod:`server.services.window`.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import select

from server.alarms.rules import default_rules, rules_in_force, zone_limits
from server.errors import AppError, Forbidden, NotFound
from server.services import machine_view, reading_view, series, window
from server.services.access import check_point, check_record
from server.storage import queries
from server.storage import tree as tree_queries
from server.storage.tables import Area, Asset, Point, Record, Site

LEVEL_METRICS = ("half_order_velocity", "half_order_ratio", "growth_rate", "overall_velocity")


def site_zone(settings, site_name: str) -> str:
    return settings.site_timezones.get(site_name, settings.site_timezone)


def asset_context(s, principal, asset_id: int):
    row = s.execute(select(Asset, Area, Site).join(Area, Area.id == Asset.area_id)
                    .join(Site, Site.id == Area.site_id).where(Asset.id == asset_id)).first()
    if row is None:
        raise NotFound(f"no asset {asset_id}; see the plant overview", field="asset_id")
    asset, area, site = row
    if not principal.may_access_site(site.id):
        raise Forbidden(f"asset {asset_id} is outside the site this key is limited to", field="asset_id")
    return asset, area, site


def asset_dict(asset: Asset, area: Area, site: Site, settings) -> dict:
    return {"id": asset.id, "name": asset.name, "kind": asset.kind, "area": area.name, "area_id": area.id,
            "site": site.name, "site_id": site.id, "timezone": site_zone(settings, site.name),
            "nominal_speed_hz": asset.nominal_speed_hz, "machine_group": asset.machine_group,
            "foundation": asset.foundation, "forcing_kind": asset.forcing_kind,
            "forcing_multiplier": asset.forcing_multiplier, "rated_power_kw": asset.rated_power_kw,
            "description": asset.description}


def point_levels(s, asset: Asset, point_ids: list[int]) -> dict[int, dict]:
    """Alert/danger levels in force per point (in the measure each rule compares: r.m.s. mm/s for the
    velocity rules), read in one query and never written (a GET). Precedence is
    :func:`rules_in_force`; a point without rules gets the default set."""
    from server.alarms.tables import AlarmRule

    rows = list(s.scalars(select(AlarmRule).where(AlarmRule.point_id.in_(point_ids)
                                                  | ((AlarmRule.asset_id == asset.id)
                                                     & AlarmRule.point_id.is_(None)))))
    defaults = {r.metric: r for r in default_rules(group=asset.machine_group or 2,
                                                   support=asset.foundation or "rigid")}

    def levels(pid: int) -> dict:
        chosen = {r.metric: r for r in rules_in_force(rows, pid)}
        out: dict[str, dict | None] = {}
        for metric in LEVEL_METRICS:
            r = chosen.get(metric)
            if r is None:
                spec = defaults.get(metric)
                out[metric] = None if spec is None else {"alert": spec.alert, "danger": spec.danger,
                                                         "zone_based": spec.zone_based}
            else:
                out[metric] = None if not r.enabled else {"alert": r.alert_level, "danger": r.danger_level,
                                                          "zone_based": r.zone_based}
        return out

    return {pid: levels(pid) for pid in point_ids}


def asset_view(db, settings, principal, asset_id: int) -> dict:
    from server.alarms import service

    with db.read() as s:
        asset, area, site = asset_context(s, principal, asset_id)
        tree = tree_queries.tree(s, site.id)
        pts = next(a["points"] for ar in tree["sites"][0]["areas"] for a in ar["assets"]
                   if a["id"] == asset_id)
        levels = point_levels(s, asset, [p["id"] for p in pts])
        periods = {p["id"]: machine_view.default_period(s, p["id"]) for p in pts}
    limits = zone_limits({}, group=asset.machine_group, support=asset.foundation)
    for p in pts:
        p["levels"] = levels[p["id"]]
        p["default_period"] = periods[p["id"]]
    alarms = service.list_alarms(db, view="all", asset_id=asset_id)
    return {"ok": True, "asset": asset_dict(asset, area, site, settings), "points": pts,
            "zone_limits_rms_mm_s": list(limits) if limits else None, "alarms": alarms,
            "limits_source": reading_view.LIMITS_SOURCE,
            "alarm_summary": alarm_summary(alarms),
            "series": {k: {"label": label, "unit": unit} for k, (label, unit) in series.SERIES.items()}}


def alarm_summary(alarms: list[dict]) -> dict:
    from server.alarms.rules import LEVEL_RANK

    worst = max((a["level"] for a in alarms), key=lambda level: LEVEL_RANK.get(level, 0), default="normal")
    return {"level": worst,
            "active": sum(1 for a in alarms if not a["acknowledged"] and not a["shelved"]),
            "acknowledged": sum(1 for a in alarms if a["acknowledged"] and not a["shelved"]),
            "shelved": sum(1 for a in alarms if a["shelved"])}


def period(start, end, default_days: float) -> tuple[dt.datetime, dt.datetime]:
    end = end or dt.datetime.now(dt.UTC)
    start = start or end - dt.timedelta(days=default_days)
    if end <= start:
        raise AppError("end must be after start", field="end")
    return start, end


def series_view(db, principal, point_id: int, start, end, max_points: int, limit: float | None) -> dict:
    """A point's chart series and the trend/forecast (to ``limit``, mm/s r.m.s.; default the point's
    half-order danger level)."""
    start, end = period(start, end, 30)
    with db.read() as s:
        check_point(s, principal, point_id)
        if limit is None:
            point = s.get(Point, point_id)
            level = point_levels(s, point.asset, [point_id])[point_id]["half_order_velocity"]
            limit = level["danger"] if level and level["danger"] else None
        data = series.point_series(s, point_id, start, end, max_points)
        changes = machine_view.speed_changes(s, point_id, start, end)
        readings = series.trend_readings(s, point_id, end.timestamp())
    fit = series.trend_forecast(readings, limit)
    return {"ok": True, "point_id": point_id, "start": queries.iso(start), "end": queries.iso(end),
            "max_points": max_points, "units": {k: unit for k, (_, unit) in series.SERIES.items()}, **data,
            "trend": fit, "speed_changes": changes}


def readings_view(db, principal, point_id: int, limit: int) -> dict:
    with db.read() as s:
        check_point(s, principal, point_id)
        rows = machine_view.recent_readings(s, point_id, limit)
    return {"ok": True, "point_id": point_id, "readings": rows}


def record_view(db, settings, principal, record_id: int) -> dict:
    with db.read() as s:
        check_record(s, principal, record_id)
        detail = queries.record_detail(s, record_id)
        rec = s.get(Record, record_id)
        point = s.get(Point, rec.point_id)
        asset, area, site = asset_context(s, principal, point.asset_id)
        newer = s.scalar(select(Record.id).where(Record.point_id == point.id,
                                                 Record.measured_at > rec.measured_at)
                         .order_by(Record.measured_at).limit(1))
        older = s.scalar(select(Record.id).where(Record.point_id == point.id,
                                                 Record.measured_at < rec.measured_at)
                         .order_by(Record.measured_at.desc()).limit(1))
        extra: dict = {"limits_source": reading_view.LIMITS_SOURCE}
        res = queries.current_result(s, record_id)
        if detail.get("result") and res is not None:
            cover = reading_view.band_coverage(detail["result"], rec.fs_hz)
            low = (cover["needed_hz"] or cover["measured_hz"] or [2.0])[0]
            extra.update(zone_band=cover,
                         velocity_spectrum=reading_view.velocity_spectrum(res.spectrum, rec.units, low))
    return {**detail, **extra, "point": {"id": point.id, "name": point.name, "location": point.location,
                                "direction": point.direction, "units": point.units},
            "asset": asset_dict(asset, area, site, settings), "newer_id": newer, "older_id": older}


def waterfall_view(db, principal, record_id: int, n: int) -> dict:
    with db.read() as s:
        check_record(s, principal, record_id)
        rec = s.get(Record, record_id)
        return reading_view.waterfall_around(s, rec, n)


def window_view(db, settings, principal, point_id: int, start, end, max_readings: int) -> dict:
    start, end = period(start, end, 365)
    with db.read() as s:
        check_point(s, principal, point_id)
        point = s.get(Point, point_id)
        asset, area, site = asset_context(s, principal, point.asset_id)
        rows = window.history_rows(s, point_id, start_ts=start.timestamp(), end_ts=end.timestamp(),
                                   limit=max_readings)
    return {"ok": True, "point": {"id": point.id, "name": point.name, "units": point.units},
            "asset": asset_dict(asset, area, site, settings),
            **window.window_answer(rows, units=point.units, forcing_per_rev=asset.forcing_multiplier)}
