"""Site scoping of reads and writes: a caller limited to one site sees and changes only that site.

The one home of the rule. Every object that belongs to a site resolves to its site here
(:func:`site_of`); routes check it with :func:`check` (403 for another site's object, 404 when there is
none) and filter lists with the SQL conditions below. An update checks the object's site as it is
*and* the site it will have afterwards (``server.services.assets.update``), so a key limited to one
site can neither change another site's object nor move it into its own site.
"""

from __future__ import annotations

from sqlalchemy import and_, false, or_, select

from server.errors import Forbidden, NotFound
from server.storage.tables import ApiKey, Area, Asset, Job, Point, Record, Route, Site

#: what a site-limited caller is told; the field names the object
OUTSIDE = "is outside the site this key is limited to"


def outside(what: str, field: str) -> Forbidden:
    return Forbidden(f"{what} {OUTSIDE}", field=field)


def point_site_id(s, point_id: int) -> int:
    site = s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                    .join(Point, Point.asset_id == Asset.id).where(Point.id == point_id))
    if site is None:
        raise NotFound(f"no measurement point {point_id}; see GET /api/v1/tree", field="point_id")
    return site


def _alarm_site(s, state_id: int) -> int | None:
    from server.alarms.tables import AlarmState

    # through the point (not the state's copied asset_id), so a moved point counts for its new site
    return s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                    .join(Point, Point.asset_id == Asset.id).join(AlarmState, AlarmState.point_id == Point.id)
                    .where(AlarmState.id == state_id))


def scope_site_id(s, scope: str, scope_id: int) -> int | None:
    """The site of a subscription scope (site, area or asset); None if it does not exist."""
    if scope == "site":
        return s.scalar(select(Site.id).where(Site.id == scope_id))
    if scope == "area":
        return s.scalar(select(Area.site_id).where(Area.id == scope_id))
    if scope == "asset":
        return s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                        .where(Asset.id == scope_id))
    return None


def subscription_site_id(s, sub_id: int) -> int | None:
    from server.alarms.tables import AlarmSubscription

    sub = s.get(AlarmSubscription, sub_id)
    return None if sub is None else scope_site_id(s, sub.scope, sub.scope_id)


_LOOKUPS = {
    "site": lambda s, i: s.scalar(select(Site.id).where(Site.id == i)),
    "area": lambda s, i: s.scalar(select(Area.site_id).where(Area.id == i)),
    "asset": lambda s, i: s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                                   .where(Asset.id == i)),
    "point": lambda s, i: s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                                   .join(Point, Point.asset_id == Asset.id).where(Point.id == i)),
    "route": lambda s, i: s.scalar(select(Route.site_id).where(Route.id == i)),
    "record": lambda s, i: s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                                    .join(Point, Point.asset_id == Asset.id)
                                    .join(Record, Record.point_id == Point.id).where(Record.id == i)),
    "job": lambda s, i: s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                                 .join(Point, Point.asset_id == Asset.id)
                                 .join(Record, Record.point_id == Point.id)
                                 .join(Job, Job.record_id == Record.id).where(Job.id == i)),
    "alarm": _alarm_site,
    "subscription": subscription_site_id,
}


_LABEL = {"point": "measurement point"}
_TREE = "; see GET /api/v1/tree"
_HINT = {"point": _TREE, "asset": _TREE, "area": _TREE,
         "route": "; see GET /api/v1/routes", "alarm": "; see GET /api/v1/alarms?view=all",
         "subscription": "; see GET /api/v1/alarms/subscriptions"}


def site_of(s, kind: str, obj_id: int) -> int:
    """The site an object belongs to; NotFound (naming ``<kind>_id``) if there is no such object."""
    site = _LOOKUPS[kind](s, obj_id)
    if site is None:
        raise NotFound(f"no {_LABEL.get(kind, kind)} {obj_id}{_HINT.get(kind, '')}", field=f"{kind}_id")
    return site


def check(s, principal, kind: str, obj_id: int, *, field: str | None = None) -> int:
    """The object's site, after checking that the caller may use it (403 if not, 404 if absent)."""
    site = site_of(s, kind, obj_id)
    if not principal.may_access_site(site):
        raise outside(f"{kind} {obj_id}", field or f"{kind}_id")
    return site


def check_site(principal, site_id: int, *, what: str | None = None, field: str = "site_id") -> None:
    if not principal.may_access_site(site_id):
        raise outside(what or f"site {site_id}", field)


def check_point(s, principal, point_id: int) -> None:
    check(s, principal, "point", point_id)


def check_record(s, principal, record_id: int) -> None:
    check(s, principal, "record", record_id)


def check_route(s, principal, route_id: int) -> Route:
    check(s, principal, "route", route_id)
    return s.get(Route, route_id)


# --- SQL conditions for lists ---------------------------------------------------------------------

def points_of_site(site_id: int):
    return select(Point.id).join(Asset, Asset.id == Point.asset_id).join(Area, Area.id == Asset.area_id) \
        .where(Area.site_id == site_id)


def assets_of_site(site_id: int):
    return select(Asset.id).join(Area, Area.id == Asset.area_id).where(Area.site_id == site_id)


def records_of_site(site_id: int):
    return select(Record.id).where(Record.point_id.in_(points_of_site(site_id)))


def jobs_condition(site_id: int | None):
    """Jobs whose record belongs to the site (None: every job)."""
    return None if site_id is None else Job.record_id.in_(records_of_site(site_id))


def subscriptions_condition(site_id: int | None):
    """Subscriptions whose scope (site, area or asset) lies in the site."""
    from server.alarms.tables import AlarmSubscription as Sub

    if site_id is None:
        return None
    return or_(and_(Sub.scope == "site", Sub.scope_id == site_id),
               and_(Sub.scope == "area", Sub.scope_id.in_(select(Area.id).where(Area.site_id == site_id))),
               and_(Sub.scope == "asset", Sub.scope_id.in_(assets_of_site(site_id))))


def audit_condition(site_id: int | None):
    """Configuration changes about objects of the site. Users and API keys are not site data, except
    keys limited to this site; a change whose target this module does not know is not shown."""
    from server.alarms.tables import AlarmRule, AlarmSubscription
    from server.audit.tables import ConfigChange as C

    if site_id is None:
        return None
    subs = select(AlarmSubscription.id).where(subscriptions_condition(site_id))
    rules = select(AlarmRule.id).where(or_(AlarmRule.point_id.in_(points_of_site(site_id)),
                                           AlarmRule.asset_id.in_(assets_of_site(site_id))))
    by_target = {
        "site": select(Site.id).where(Site.id == site_id),
        "area": select(Area.id).where(Area.site_id == site_id),
        "asset": assets_of_site(site_id),
        "point": points_of_site(site_id),
        "route": select(Route.id).where(Route.site_id == site_id),
        "alarm_rule": rules,
        "subscription": subs,
        "api_key": select(ApiKey.id).where(ApiKey.site_id == site_id),
        "record": records_of_site(site_id),  # pins of a reading's waveform
    }
    return or_(false(), *(and_(C.target == t, C.target_id.in_(q)) for t, q in by_target.items()))


