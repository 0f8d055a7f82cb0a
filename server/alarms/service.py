"""Use cases behind the alarm API: list, acknowledge, shelve, history, subscriptions, rules.

Each write is one unit of work and adds an audit event (``acknowledged``/``shelved``/``unshelved``).
Bad input raises :class:`AlarmInputError` with the field name and the fix in the message.
"""

from __future__ import annotations

import datetime as dt
import re
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from sqlalchemy import select

from server import audit
from server.names import EMAIL_RE  # the one address rule (users and subscriptions)
from server.storage.tables import Area, Asset, Point, Site, utcnow

from .digest import scope_filter
from .rules import LEVEL_RANK, METRICS, RuleSpec, rule_label, value_text
from .tables import (
    MODES,
    SCOPES,
    AlarmEvent,
    AlarmPointStatus,
    AlarmRule,
    AlarmState,
    AlarmSubscription,
)

VIEWS = ("active", "acknowledged", "shelved", "all")


class AlarmInputError(ValueError):
    def __init__(self, field: str, message: str, status: int = 422):
        super().__init__(message)
        self.field, self.status = field, status


class AlarmNotFound(LookupError):
    def __init__(self, what: str):
        super().__init__(f"{what} not found")
        self.field = "id"


def _level(value: str | None, field: str = "level") -> str | None:
    if value is None:
        return None
    if value not in ("alert", "danger"):
        raise AlarmInputError(field, f"{field}: use 'alert' or 'danger'")
    return value


def state_dict(state: AlarmState, point: Point, asset: Asset, area: Area, now: dt.datetime,
               status: AlarmPointStatus | None = None) -> dict:
    shelved = state.shelved_until is not None and state.shelved_until > now
    metrics = (status.last_metrics or {}) if status is not None else {}
    latest = metrics.get(state.metric)
    value = latest if latest is not None else state.last_value
    return {
        "id": state.id, "point_id": point.id, "point": point.name, "asset_id": asset.id, "asset": asset.name,
        "area_id": area.id, "area": area.name, "site_id": area.site_id, "metric": state.metric,
        "rule": rule_label(state.metric, metrics.get("line_class"), metrics.get("line_order")),
        "unit": METRICS[state.metric].unit, "rule_id": state.rule_id,
        "level": state.level, "value": value, "value_text": value_text(state.metric, value),
        "value_at_change": state.last_value, "since": state.since.isoformat(),
        "record_id": status.last_record_id if status is not None else state.last_record_id,
        "acknowledged": bool(state.acked_level),
        "acked_level": state.acked_level, "acked_by": state.acked_by,
        "acked_at": state.acked_at.isoformat() if state.acked_at else None, "ack_comment": state.ack_comment,
        "shelved": shelved, "shelved_until": state.shelved_until.isoformat() if shelved else None,
        "shelve_reason": state.shelve_reason if shelved else None,
    }


def _joined(stmt, *, site_id=None, area_id=None, asset_id=None):
    stmt = stmt.join(Point, Point.id == AlarmState.point_id).join(Asset, Asset.id == Point.asset_id) \
        .join(Area, Area.id == Asset.area_id)
    for scope, value in (("site", site_id), ("area", area_id), ("asset", asset_id)):
        if value is not None:
            stmt = scope_filter(stmt, scope, value)
    return stmt


def list_alarms(db, *, view: str = "active", site_id=None, area_id=None, asset_id=None, level=None,
                now: dt.datetime | None = None) -> list[dict]:
    """Open alarms: ``active`` (not acknowledged, not shelved), ``acknowledged``, ``shelved``, ``all``."""
    if view not in VIEWS:
        raise AlarmInputError("view", f"view: use one of {', '.join(VIEWS)}")
    _level(level)
    now = now or utcnow()
    stmt = _joined(select(AlarmState, Point, Asset, Area, AlarmPointStatus)
                   .outerjoin(AlarmPointStatus, AlarmPointStatus.point_id == AlarmState.point_id)
                   .where(AlarmState.level != "normal"), site_id=site_id, area_id=area_id, asset_id=asset_id)
    out = []
    with db.read() as s:
        for state, point, asset, area, status in s.execute(stmt):
            d = state_dict(state, point, asset, area, now, status)
            if level and state.level != level:
                continue
            if view == "active" and (d["acknowledged"] or d["shelved"]):
                continue
            if view == "acknowledged" and not (d["acknowledged"] and not d["shelved"]):
                continue
            if view == "shelved" and not d["shelved"]:
                continue
            out.append(d)
    out.sort(key=lambda d: (-LEVEL_RANK[d["level"]], d["since"]))
    return out


def event_dict(e: AlarmEvent) -> dict:
    return {
        "id": e.id, "kind": e.kind, "point_id": e.point_id, "asset_id": e.asset_id, "area_id": e.area_id,
        "site_id": e.site_id, "metric": e.metric, "rule_id": e.rule_id, "from_level": e.from_level,
        "to_level": e.to_level, "value": e.value, "threshold": e.threshold, "record_id": e.record_id,
        "actor": e.actor, "comment": e.comment, "summary": e.summary, "created_at": e.created_at.isoformat(),
        "where": (e.details or {}).get("where"),
    }


def history(db, *, site_id=None, area_id=None, asset_id=None, point_id=None, level=None, kind=None,
            limit: int = 200, before_id: int | None = None) -> list[dict]:
    _level(level)
    if not 1 <= limit <= 1000:
        raise AlarmInputError("limit", "limit: use 1 to 1000")
    stmt = select(AlarmEvent).order_by(AlarmEvent.id.desc()).limit(limit)
    for column, value in ((AlarmEvent.site_id, site_id), (AlarmEvent.area_id, area_id),
                          (AlarmEvent.asset_id, asset_id), (AlarmEvent.point_id, point_id),
                          (AlarmEvent.to_level, level), (AlarmEvent.kind, kind)):
        if value is not None:
            stmt = stmt.where(column == value)
    if before_id is not None:
        stmt = stmt.where(AlarmEvent.id < before_id)
    with db.read() as s:
        return [event_dict(e) for e in s.scalars(stmt)]


def state_site_id(db, state_id: int) -> int | None:
    with db.read() as s:
        return s.scalar(select(Area.site_id).join(Asset, Asset.area_id == Area.id)
                        .join(AlarmState, AlarmState.asset_id == Asset.id).where(AlarmState.id == state_id))


def open_data_quality(db, *, site_id: int | None = None) -> list[dict]:
    """Points whose latest record was refused as a data-quality problem."""
    stmt = (select(AlarmPointStatus, Point, Asset, Area).join(Point, Point.id == AlarmPointStatus.point_id)
            .join(Asset, Asset.id == Point.asset_id).join(Area, Area.id == Asset.area_id)
            .where(AlarmPointStatus.data_quality_open.is_(True)))
    if site_id is not None:
        stmt = stmt.where(Area.site_id == site_id)
    with db.read() as s:
        return [{"point_id": p.id, "point": p.name, "asset_id": a.id, "asset": a.name, "area": ar.name,
                 "site_id": ar.site_id, "reason": st.data_quality_reason,
                 "since": st.updated_at.isoformat()} for st, p, a, ar in s.execute(stmt)]


def _open_state(s, state_id: int) -> AlarmState:
    state = s.get(AlarmState, state_id)
    if state is None:
        raise AlarmNotFound(f"alarm {state_id}")
    if state.level == "normal":
        raise AlarmInputError("id", f"alarm {state_id} is not open (level normal); nothing to do", status=409)
    return state


def _audit(s, state: AlarmState, kind: str, actor: str, comment: str, now: dt.datetime, **details) -> dict:
    point = s.get(Point, state.point_id)
    area = point.asset.area
    event = AlarmEvent(kind=kind, point_id=state.point_id, asset_id=state.asset_id, area_id=area.id,
                       site_id=area.site_id, metric=state.metric, rule_id=state.rule_id,
                       from_level=state.level, to_level=state.level, value=state.last_value, actor=actor,
                       comment=comment, summary=f"{kind} by {actor}: {comment}", details=details,
                       created_at=now)
    s.add(event)
    s.flush()
    return event_dict(event)


def _text(value: str, field: str, what: str) -> str:
    value = (value or "").strip()
    if not value:
        raise AlarmInputError(field, f"{field}: {what} is required")
    if len(value) > 2000:
        raise AlarmInputError(field, f"{field}: keep it under 2000 characters")
    return value


def acknowledge(db, state_id: int, *, actor: str, comment: str, now: dt.datetime | None = None) -> dict:
    comment = _text(comment, "comment", "a comment saying what is being done")
    now = now or utcnow()
    with db.unit_of_work() as s:
        state = _open_state(s, state_id)
        state.acked_level, state.acked_by, state.acked_at = state.level, actor, now
        state.ack_comment = comment
        return _audit(s, state, "acknowledged", actor, comment, now)


def shelve(db, state_id: int, *, actor: str, until: dt.datetime, reason: str,
           now: dt.datetime | None = None) -> dict:
    reason = _text(reason, "reason", "a reason")
    now = now or utcnow()
    _check_until(until, now)
    with db.unit_of_work() as s:
        state = _open_state(s, state_id)
        state.shelved_until, state.shelve_reason, state.shelved_by = until, reason, actor
        state.shelved_level = state.level
        return _audit(s, state, "shelved", actor, reason, now, until=until.isoformat())


def _check_until(until: dt.datetime, now: dt.datetime) -> None:
    if until.tzinfo is None:
        raise AlarmInputError("until", "until: give a time zone, e.g. 2026-12-24T08:00:00Z")
    if until <= now:
        raise AlarmInputError("until", "until: must be in the future")
    if until > now + dt.timedelta(days=366):
        raise AlarmInputError("until", "until: shelve for at most a year")


def unshelve(db, state_id: int, *, actor: str, now: dt.datetime | None = None) -> dict:
    now = now or utcnow()
    with db.unit_of_work() as s:
        state = _open_state(s, state_id)
        state.shelved_until = state.shelve_reason = state.shelved_by = state.shelved_level = None
        return _audit(s, state, "unshelved", actor, "shelving ended", now)


# --- subscriptions -------------------------------------------------------------------------------

def subscription_dict(sub: AlarmSubscription) -> dict:
    return {"id": sub.id, "email": sub.email, "scope": sub.scope, "scope_id": sub.scope_id,
            "min_level": sub.min_level, "mode": sub.mode, "digest_time": sub.digest_time,
            "timezone": sub.timezone, "include_data_quality": sub.include_data_quality, "active": sub.active,
            "created_by": sub.created_by}


def _check_subscription(s, body: dict) -> dict:
    email = str(body.get("email") or "").strip().lower()
    if not EMAIL_RE.match(email) or len(email) > 200:
        raise AlarmInputError("email", "email: give one address like planner@example.com")
    scope = body.get("scope")
    if scope not in SCOPES:
        raise AlarmInputError("scope", f"scope: use one of {', '.join(SCOPES)}")
    table = {"site": Site, "area": Area, "asset": Asset}[scope]
    if not isinstance(body.get("scope_id"), int) or s.get(table, body["scope_id"]) is None:
        raise AlarmInputError("scope_id", f"scope_id: no {scope} with id {body.get('scope_id')!r}")
    _level(body.get("min_level", "alert"), "min_level")
    if body.get("mode", "immediate") not in MODES:
        raise AlarmInputError("mode", "mode: use 'immediate' or 'digest'")
    digest_time = str(body.get("digest_time", "07:00"))
    m = re.fullmatch(r"([01]\d|2[0-3]):([0-5]\d)", digest_time)
    if not m:
        raise AlarmInputError("digest_time", "digest_time: local time as HH:MM, e.g. 07:30")
    tz = str(body.get("timezone", "UTC"))
    try:
        ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError):
        raise AlarmInputError("timezone", "timezone: an IANA name such as Europe/Berlin or UTC") from None
    return {"email": email, "scope": scope, "scope_id": body["scope_id"],
            "min_level": body.get("min_level", "alert"), "mode": body.get("mode", "immediate"),
            "digest_time": digest_time, "timezone": tz,
            "include_data_quality": bool(body.get("include_data_quality", False))}


def create_subscription(db, body: dict, *, actor: str) -> dict:
    with db.unit_of_work() as s:
        sub = AlarmSubscription(**_check_subscription(s, body), active=True, created_by=actor)
        s.add(sub)
        s.flush()
        out = subscription_dict(sub)
        audit.record(s, actor=actor, action="create", target="subscription", target_id=sub.id,
                     subscription=out)
        return out


def list_subscriptions(db, *, email: str | None = None) -> list[dict]:
    stmt = select(AlarmSubscription).where(AlarmSubscription.active.is_(True)).order_by(AlarmSubscription.id)
    if email:
        stmt = stmt.where(AlarmSubscription.email == email)
    with db.read() as s:
        return [subscription_dict(x) for x in s.scalars(stmt)]


def delete_subscription(db, sub_id: int, *, actor: str = "") -> None:
    with db.unit_of_work() as s:
        sub = s.get(AlarmSubscription, sub_id)
        if sub is None or not sub.active:
            raise AlarmNotFound(f"subscription {sub_id}")
        sub.active = False
        audit.record(s, actor=actor, action="delete", target="subscription", target_id=sub_id,
                     email=sub.email)


# --- rules ---------------------------------------------------------------------------------------

def rule_dict(r: AlarmRule) -> dict:
    return {"id": r.id, "asset_id": r.asset_id, "point_id": r.point_id, "metric": r.metric,
            "label": METRICS[r.metric].label, "unit": METRICS[r.metric].unit, "alert": r.alert_level,
            "danger": r.danger_level, "direction": r.direction, "zone_based": r.zone_based, "k": r.persist_k,
            "n": r.persist_n, "hysteresis": r.hysteresis, "enabled": r.enabled, "is_default": r.is_default,
            "alert_text": value_text(r.metric, r.alert_level),
            "danger_text": value_text(r.metric, r.danger_level)}


def list_rules(db, *, point_id: int) -> list[dict]:
    from .evaluate import effective_rules

    with db.read() as s:  # a read: defaults not stored yet are shown, not written
        point = s.get(Point, point_id)
        if point is None:
            raise AlarmNotFound(f"point {point_id}")
        return [rule_dict(r) for r in effective_rules(s, point, persist=False)]


def set_rule(db, body: dict, *, actor: str) -> dict:
    """Create or replace the rule for a metric on one point or one asset."""
    point_id, asset_id = body.get("point_id"), body.get("asset_id")
    if (point_id is None) == (asset_id is None):
        raise AlarmInputError("point_id", "point_id: give exactly one of point_id or asset_id")
    metric = body.get("metric")
    spec = RuleSpec(metric=metric, alert=body.get("alert"), danger=body.get("danger"), k=body.get("k", 2),
                    n=body.get("n", 3), hysteresis=body.get("hysteresis", 0.1),
                    direction=body.get("direction", METRICS[metric].direction if metric in METRICS
                                       else "above"),
                    zone_based=bool(body.get("zone_based", False)), enabled=bool(body.get("enabled", True)))
    try:
        spec.validate()
    except ValueError as exc:
        raise AlarmInputError(str(exc).split(":")[0], str(exc)) from None
    with db.unit_of_work() as s:
        if point_id is not None and s.get(Point, point_id) is None:
            raise AlarmInputError("point_id", f"point_id: no point with id {point_id}")
        if asset_id is not None and s.get(Asset, asset_id) is None:
            raise AlarmInputError("asset_id", f"asset_id: no asset with id {asset_id}")
        if point_id is not None:
            from .evaluate import ensure_default_rules

            ensure_default_rules(s, s.get(Point, point_id))
        owner = AlarmRule.point_id == point_id if point_id is not None else \
            (AlarmRule.asset_id == asset_id) & AlarmRule.point_id.is_(None)
        row = s.scalars(select(AlarmRule).where(owner, AlarmRule.metric == metric)).first()
        if row is None:
            row = AlarmRule(point_id=point_id, asset_id=asset_id, metric=metric)
            s.add(row)
        row.alert_level, row.danger_level, row.direction = spec.alert, spec.danger, spec.direction
        row.zone_based, row.persist_k, row.persist_n = spec.zone_based, spec.k, spec.n
        row.hysteresis, row.enabled, row.is_default = spec.hysteresis, spec.enabled, False
        row.updated_by, row.updated_at = actor, utcnow()
        s.flush()
        out = rule_dict(row)
        audit.record(s, actor=actor, action="set", target="alarm_rule", target_id=row.id, rule=out)
        return out


# --- outbox --------------------------------------------------------------------------------------

def outbox_list(db, *, status: str | None = None, limit: int = 100) -> list[dict]:
    """Recent emails with their delivery state (admins check failed ones here)."""
    from .tables import OUTBOX_STATES, OutboxMessage

    if status is not None and status not in OUTBOX_STATES:
        raise AlarmInputError("status", f"status: use one of {', '.join(OUTBOX_STATES)}")
    stmt = select(OutboxMessage).order_by(OutboxMessage.id.desc()).limit(limit)
    if status:
        stmt = stmt.where(OutboxMessage.status == status)
    with db.read() as s:
        return [{"id": m.id, "kind": m.kind, "recipient": m.recipient, "subject": m.subject,
                 "status": m.status, "attempts": m.attempts, "last_error": m.last_error,
                 "event_id": m.event_id,
                 "created_at": m.created_at.isoformat(),
                 "sent_at": m.sent_at.isoformat() if m.sent_at else None,
                 "next_attempt_at": m.next_attempt_at.isoformat()} for m in s.scalars(stmt)]
