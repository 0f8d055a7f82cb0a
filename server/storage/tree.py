"""The asset tree with the latest state of every point, and routes with due/overdue points."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import and_, func, or_, select

from server.storage.queries import iso
from server.storage.tables import Area, Asset, Job, Point, Record, Result, Route, RouteStop, Site, utcnow

#: a route stop is "due" from its due time on, and "overdue" once a further quarter of its interval passed
OVERDUE_GRACE = 0.25


def _latest_results(s, point_ids: list[int]) -> dict[int, Result]:
    if not point_ids:
        return {}
    # one max() per point through the (point_id, current, measured_ts) index: no scan of the history
    newest = (select(func.max(Result.measured_ts))
              .where(Result.point_id == Point.id, Result.current.is_(True))
              .correlate(Point).scalar_subquery())
    pairs = [(p, t) for p, t in s.execute(select(Point.id, newest).where(Point.id.in_(point_ids)))
             if t is not None]
    if not pairs:
        return {}
    out: dict[int, Result] = {}
    for i in range(0, len(pairs), 200):  # index seeks; chunks keep the OR below SQLite's expression depth
        match = or_(*[and_(Result.point_id == p, Result.measured_ts == t) for p, t in pairs[i:i + 200]])
        for r in s.scalars(select(Result).where(Result.current.is_(True), match).order_by(Result.id)):
            out[r.point_id] = r
    return out


def _last_records(s, point_ids: list[int]) -> dict[int, tuple[int, dt.datetime]]:
    if not point_ids:
        return {}
    last = select(func.max(Record.measured_at)).where(Record.point_id == Point.id).correlate(Point)
    count = select(func.count()).where(Record.point_id == Point.id).correlate(Point)
    rows = s.execute(select(Point.id, last.scalar_subquery(), count.scalar_subquery())
                     .where(Point.id.in_(point_ids)))
    return {p: (n, t) for p, t, n in rows if n}


def _pending(s, point_ids: list[int]) -> dict[int, dict[str, int]]:
    out: dict[int, dict[str, int]] = {}
    if not point_ids:
        return out
    rows = s.execute(select(Record.point_id, Job.state, func.count()).join(Record, Record.id == Job.record_id)
                     .where(Record.point_id.in_(point_ids), Job.state.in_(("queued", "running", "failed")))
                     .group_by(Record.point_id, Job.state))
    for p, state, n in rows:
        out.setdefault(p, {})[state] = n
    return out


def point_state(result: Result | None, jobs: dict[str, int], n_records: int) -> str:
    if n_records == 0:
        return "no-data"
    if result is None:
        waiting = jobs.get("queued") or jobs.get("running")
        return "failed" if jobs.get("failed") and not waiting else "pending"
    if result.sub_detected:  # shown even with quality flags (the flags are in "latest")
        return "subharmonic"
    return "no-subharmonic" if result.quality_ok else "data-quality"


def latest_dict(res: Result) -> dict:
    measured = dt.datetime.fromtimestamp(res.measured_ts, dt.UTC)
    return {"record_id": res.record_id, "measured_at": iso(measured),
            "subharmonic_detected": res.sub_detected, "subharmonic_class": res.sub_class,
            "subharmonic_frequency_hz": res.sub_frequency_hz, "subharmonic_accel_peak": res.sub_accel_peak,
            "subharmonic_velocity_peak_mm_s": res.sub_velocity_peak_mm_s,
            "subharmonic_velocity_rms_mm_s": res.sub_velocity_rms_mm_s, "growth_rate_per_s":
            res.growth_rate_per_s,
            "overall_velocity_rms_mm_s": res.overall_velocity_rms_mm_s, "zone": res.zone,
            "forcing_hz": res.forcing_hz, "quality_ok": res.quality_ok}


def tree(s, site_scope: int | None = None) -> dict:
    q = select(Site).order_by(Site.name)
    if site_scope is not None:
        q = q.where(Site.id == site_scope)
    sites = list(s.scalars(q))
    site_ids = [x.id for x in sites]
    points = list(s.scalars(select(Point).join(Asset).join(Area).where(Area.site_id.in_(site_ids))))
    ids = [p.id for p in points]
    latest, last_rec, pending = _latest_results(s, ids), _last_records(s, ids), _pending(s, ids)

    def point_dict(p: Point) -> dict:
        n, last = last_rec.get(p.id, (0, None))
        res = latest.get(p.id)
        jobs = pending.get(p.id, {})
        return {"id": p.id, "name": p.name, "location": p.location, "direction": p.direction,
                "units": p.units, "expected_fs_hz": p.expected_fs_hz,
                "sensitivity_mv_per_unit": p.sensitivity_mv_per_unit,
                "records": n, "last_measured_at": iso(last), "jobs": jobs,
                "state": point_state(res, jobs, n),
                "latest": None if res is None else latest_dict(res)}

    def asset_dict(a: Asset) -> dict:
        return {"id": a.id, "name": a.name, "kind": a.kind, "rated_power_kw": a.rated_power_kw,
                "machine_group": a.machine_group, "foundation": a.foundation,
                "nominal_speed_hz": a.nominal_speed_hz, "forcing_kind": a.forcing_kind,
                "forcing_multiplier": a.forcing_multiplier, "description": a.description,
                "points": [point_dict(p) for p in a.points]}

    return {"ok": True, "sites": [
        {"id": site.id, "name": site.name, "description": site.description, "areas": [
            {"id": ar.id, "name": ar.name, "description": ar.description,
             "assets": [asset_dict(a) for a in ar.assets]} for ar in site.areas]}
        for site in sites]}


def routes_due(s, site_scope: int | None = None, now: dt.datetime | None = None) -> dict:
    now = now or utcnow()
    q = select(Route).order_by(Route.name)
    if site_scope is not None:
        q = q.where(Route.site_id == site_scope)
    routes = list(s.scalars(q))
    point_ids = list({st.point_id for r in routes for st in r.stops})
    last = _last_records(s, point_ids)
    out = []
    for r in routes:
        stops, counts = [], {"ok": 0, "due": 0, "overdue": 0}
        for st in r.stops:
            _, t = last.get(st.point_id, (0, None))
            interval = dt.timedelta(hours=st.due_interval_h)
            due_at = None if t is None else t + interval
            if due_at is None or now >= due_at + OVERDUE_GRACE * interval:
                status = "overdue" if due_at is not None else "due"
            elif now >= due_at:
                status = "due"
            else:
                status = "ok"
            counts[status] += 1
            stops.append({"position": st.position, "point_id": st.point_id, "point": st.point.name,
                          "asset": st.point.asset.name, "due_interval_h": st.due_interval_h,
                          "last_measured_at": iso(t), "due_at": iso(due_at), "status": status})
        out.append({"id": r.id, "name": r.name, "site_id": r.site_id, "description": r.description,
                    "counts": counts, "stops": stops})
    return {"ok": True, "now": iso(now), "routes": out}


def route_stop_points(s, route_id: int) -> dict[str, int]:
    """Names a manifest may use for a route's points: the point name or its id as text."""
    rows = s.execute(select(Point.id, Point.name).join(RouteStop, RouteStop.point_id == Point.id)
                     .where(RouteStop.route_id == route_id))
    out: dict[str, int] = {}
    for pid, name in rows:
        out[str(pid)] = pid
        out[name] = pid
    return out
