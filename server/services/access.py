"""Site scoping of reads and writes: an API key limited to one site sees only that site."""

from __future__ import annotations

from sqlalchemy import select

from server.errors import Forbidden, NotFound
from server.storage.tables import Area, Asset, Point, Record, Route


def point_site_id(s, point_id: int) -> int:
    site = s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                    .join(Point, Point.asset_id == Asset.id).where(Point.id == point_id))
    if site is None:
        raise NotFound(f"no measurement point {point_id}; see GET /api/v1/tree", field="point_id")
    return site


def check_point(s, principal, point_id: int) -> None:
    if not principal.may_access_site(point_site_id(s, point_id)):
        raise Forbidden(f"point {point_id} is outside the site this key is limited to", field="point_id")


def check_record(s, principal, record_id: int) -> None:
    point_id = s.scalar(select(Record.point_id).where(Record.id == record_id))
    if point_id is None:
        raise NotFound(f"no record {record_id}", field="record_id")
    check_point(s, principal, point_id)


def check_route(s, principal, route_id: int) -> Route:
    route = s.get(Route, route_id)
    if route is None:
        raise NotFound(f"no route {route_id}; see GET /api/v1/routes", field="route_id")
    if not principal.may_access_site(route.site_id):
        raise Forbidden(f"route {route_id} is outside the site this key is limited to", field="route_id")
    return route
