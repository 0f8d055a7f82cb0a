"""Asset registry and routes (write side): site -> area -> asset -> point; routes of points."""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError

from server import audit
from server.errors import AppError, Conflict, Forbidden, NotFound
from server.services.access import point_site_id
from server.storage.tables import Area, Asset, Point, Route, RouteStop, Site

KINDS = {"site": Site, "area": Area, "asset": Asset, "point": Point, "route": Route}


def _row_dict(row) -> dict:
    return {c.key: getattr(row, c.key) for c in row.__table__.columns if not c.key.endswith("_at")}


def _parent_site(s, kind: str, data: dict) -> int | None:
    if kind == "area" or kind == "route":
        site = s.get(Site, data["site_id"])
        if site is None:
            raise NotFound(f"no site {data['site_id']}", field="site_id")
        return site.id
    if kind == "asset":
        area = s.get(Area, data["area_id"])
        if area is None:
            raise NotFound(f"no area {data['area_id']}", field="area_id")
        return area.site_id
    if kind == "point":
        asset = s.get(Asset, data["asset_id"])
        if asset is None:
            raise NotFound(f"no asset {data['asset_id']}", field="asset_id")
        return asset.area.site_id
    return None


def create(db, kind: str, data: dict, principal) -> dict:
    """Create a site, area, asset, point or route (with its stops) in one transaction."""
    model = KINDS[kind]
    stops = data.pop("stops", None) if kind == "route" else None
    try:
        with db.unit_of_work() as s:
            site_id = _parent_site(s, kind, data)
            if site_id is not None and not principal.may_access_site(site_id):
                raise Forbidden(f"site {site_id} is outside the site this key is limited to", field="site_id")
            if kind == "site" and principal.site_id is not None:
                raise Forbidden("a key limited to one site cannot create sites", field="name")
            row = model(**data)
            s.add(row)
            s.flush()
            if kind == "point":
                _default_alarm_rules(s, row)
            if stops is not None:
                _set_stops(s, row, stops, principal)
            out = _row_dict(row)
            audit.record(s, actor=principal.label, action="create", target=kind, target_id=row.id, values=out)
            return {"ok": True, kind: out}
    except IntegrityError:
        raise Conflict(f"a {kind} named {data.get('name')!r} already exists there; choose another name",
                       field="name") from None


def _default_alarm_rules(s, point: Point) -> None:
    try:
        from server.alarms import ensure_default_rules
    except ImportError:  # pragma: no cover - the alarm package is part of the service
        return
    ensure_default_rules(s, point)


def _set_stops(s, route: Route, stops: list[dict], principal=None) -> None:
    seen = set()
    for i, st in enumerate(stops):
        pid = st["point_id"]
        if pid in seen:
            raise AppError(f"point {pid} appears twice in the route", field=f"stops.{i}.point_id")
        seen.add(pid)
        try:
            site = point_site_id(s, pid)
        except NotFound:
            raise NotFound(f"no measurement point {pid}", field=f"stops.{i}.point_id") from None
        if principal is not None and not principal.may_access_site(site):
            raise Forbidden(f"point {pid} is outside the site this key is limited to",
                            field=f"stops.{i}.point_id")
        if site != route.site_id:
            raise AppError(f"point {pid} belongs to another site than the route", field=f"stops.{i}.point_id")
    for st in list(route.stops):
        s.delete(st)
    s.flush()
    for i, st in enumerate(stops):
        s.add(RouteStop(route_id=route.id, point_id=st["point_id"], position=i,
                        due_interval_h=st.get("due_interval_h", 720.0)))


PARENT_FIELD = {"area": "site_id", "route": "site_id", "asset": "area_id", "point": "asset_id"}


def update(db, kind: str, row_id: int, data: dict, principal) -> dict:
    """Change an object. The caller must have access to its site as it is and as it will be (a new
    parent on another site): a site-limited key can neither change another site's object nor move one
    into or out of its own site."""
    model = KINDS[kind]
    with db.unit_of_work() as s:
        row = s.get(model, row_id)
        if row is None:
            raise NotFound(f"no {kind} {row_id}", field=f"{kind}_id")
        current = _row_dict(row)
        site_now = row.id if kind == "site" else _parent_site(s, kind, current)
        if not principal.may_access_site(site_now):
            raise Forbidden(f"{kind} {row_id} is outside the site this key is limited to", field=f"{kind}_id")
        site_then = site_now if kind == "site" else _parent_site(s, kind, {**current, **data})
        if not principal.may_access_site(site_then):
            parent = PARENT_FIELD[kind]
            raise Forbidden(f"{parent} {data.get(parent)} is on site {site_then}, outside the site this key "
                            f"is limited to; a {kind} can only be moved within that site", field=parent)
        stops = data.pop("stops", None) if kind == "route" else None
        if site_then != site_now:
            _check_move(s, kind, row, site_then, stops)
        for key, value in data.items():
            setattr(row, key, value)
        if stops is not None:
            _set_stops(s, row, stops, principal)
        try:
            s.flush()
        except IntegrityError:
            raise Conflict(f"a {kind} with that name already exists there", field="name") from None
        out = _row_dict(row)
        changed = {k: [current.get(k), out.get(k)] for k in out if current.get(k) != out.get(k)}
        audit.record(s, actor=principal.label, action="update", target=kind, target_id=row_id,
                     changed=changed, stops_set=stops is not None)
        return {"ok": True, kind: out}


def _check_move(s, kind: str, row, site_then: int, stops) -> None:
    """A move to another site keeps routes on one site: a route's stops must be on the route's site."""
    if kind == "route":
        if stops is None and any(point_site_id(s, st.point_id) != site_then for st in row.stops):
            raise AppError(f"route {row.id} has stops on its present site; send the stops of site "
                           f"{site_then} with the new site_id", field="stops", status=422, code="invalid")
        return
    points = {"point": lambda: [row.id],
              "asset": lambda: [p.id for p in row.points],
              "area": lambda: [p.id for a in row.assets for p in a.points]}[kind]()
    if not points:
        return
    clash = s.execute(select(RouteStop.point_id, Route.name).join(Route, Route.id == RouteStop.route_id)
                      .where(RouteStop.point_id.in_(points), Route.site_id != site_then)).first()
    if clash is not None:
        raise Conflict(f"point {clash[0]} is a stop of route {clash[1]!r} on another site; take it off that "
                       "route before moving it", field=PARENT_FIELD[kind])


def find_site(s, name_or_id: str) -> Site | None:
    site = s.get(Site, int(name_or_id)) if str(name_or_id).isdigit() else None
    return site or s.scalar(select(Site).where(Site.name == str(name_or_id)))
