"""The daily digest: at each subscription's local time, one email with the open alarms by severity."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError

from server.storage.tables import Area, Asset, Point, Site, utcnow

from .notify import message_id
from .rules import LEVEL_RANK, rule_label, value_text
from .tables import AlarmEvent, AlarmPointStatus, AlarmState, AlarmSubscription, OutboxMessage


def scope_filter(stmt, scope: str, scope_id: int):
    """Restrict a statement that joins Asset and Area to a site, area or asset."""
    column = {"site": Area.site_id, "area": Area.id, "asset": Asset.id}[scope]
    return stmt.where(column == scope_id)


def scope_name(session, scope: str, scope_id: int) -> str:
    table = {"site": Site, "area": Area, "asset": Asset}[scope]
    obj = session.get(table, scope_id)
    return f"{scope} {obj.name}" if obj is not None else f"{scope} #{scope_id}"


def open_alarm_rows(session, scope: str, scope_id: int, *, min_level: str = "alert",
                    now: dt.datetime | None = None) -> list[dict]:
    now = now or utcnow()
    stmt = (
        select(AlarmState, Point.name, Asset.name, AlarmPointStatus.last_metrics)
        .join(Point, Point.id == AlarmState.point_id)
        .outerjoin(AlarmPointStatus, AlarmPointStatus.point_id == AlarmState.point_id)
        .join(Asset, Asset.id == Point.asset_id)
        .join(Area, Area.id == Asset.area_id)
        .where(AlarmState.level != "normal")
    )
    rows = []
    for state, point_name, asset_name, latest in session.execute(scope_filter(stmt, scope, scope_id)):
        value = (latest or {}).get(state.metric, state.last_value)
        if LEVEL_RANK[state.level] < LEVEL_RANK[min_level]:
            continue
        if state.shelved_until and state.shelved_until > now:
            status = f"shelved until {state.shelved_until:%Y-%m-%d}"
        elif state.acked_level:
            status = f"acknowledged by {state.acked_by}"
        else:
            status = "open"
        latest = latest or {}
        rows.append({
            "level": state.level, "asset": asset_name, "asset_id": state.asset_id, "point": point_name,
            "metric": state.metric,
            "rule": rule_label(state.metric, latest.get("line_class"), latest.get("line_order")),
            "value": value_text(state.metric, value),
            "since": f"{state.since:%Y-%m-%d %H:%M} UTC", "status": status,
        })
    return by_machine(rows)


def by_machine(rows: list[dict]) -> list[dict]:
    """Rows grouped by machine, the worst machine first (its highest level, then how many rules are at
    it), each machine's rules worst first."""
    worst: dict[str, tuple[int, int]] = {}
    for r in rows:
        rank = LEVEL_RANK[r["level"]]
        top, n = worst.get(r["asset"], (-1, 0))
        worst[r["asset"]] = (rank, 1) if rank > top else (top, n + (rank == top))
    return sorted(rows, key=lambda r: (-worst[r["asset"]][0], -worst[r["asset"]][1], r["asset"],
                                       -LEVEL_RANK[r["level"]], r["point"], r["rule"]))


def _changes_24h(session, scope: str, scope_id: int, now: dt.datetime) -> int:
    column = {"site": AlarmEvent.site_id, "area": AlarmEvent.area_id, "asset": AlarmEvent.asset_id}[scope]
    return session.scalar(
        select(func.count()).select_from(AlarmEvent).where(
            column == scope_id, AlarmEvent.kind == "transition",
            AlarmEvent.created_at >= now - dt.timedelta(hours=24))
    ) or 0


def is_due(sub: AlarmSubscription, now: dt.datetime) -> str | None:
    """The local date whose digest is due now, or ``None``."""
    local = now.astimezone(ZoneInfo(sub.timezone))
    hh, mm = (int(x) for x in sub.digest_time.split(":"))
    if (local.hour, local.minute) < (hh, mm):
        return None
    date = local.date().isoformat()
    return None if sub.last_digest_date == date else date


def queue_due_digests(db, *, now: dt.datetime | None = None) -> int:
    """Add one digest email per due subscription; returns how many were queued."""
    now = now or utcnow()
    with db.read() as s:
        subs = s.scalars(select(AlarmSubscription).where(
            AlarmSubscription.active.is_(True), AlarmSubscription.mode == "digest")).all()
        due = [(sub.id, d) for sub in subs if (d := is_due(sub, now))]
    queued = 0
    for sub_id, local_date in due:
        try:
            with db.unit_of_work() as s:
                sub = s.get(AlarmSubscription, sub_id)
                if sub.last_digest_date == local_date:
                    continue
                sub.last_digest_date = local_date
                rows = open_alarm_rows(s, sub.scope, sub.scope_id, min_level=sub.min_level, now=now)
                changes = _changes_24h(s, sub.scope, sub.scope_id, now)
                if not rows and not changes:
                    continue  # nothing open and nothing happened: no email
                key = f"digest:{sub.id}:{local_date}"
                s.add(OutboxMessage(
                    dedupe_key=key, kind="digest", subscription_id=sub.id,
                    recipient=sub.email.strip().lower(),
                    payload={"rows": rows, "scope_name": scope_name(s, sub.scope, sub.scope_id),
                             "local_date": local_date, "changes_24h": changes},
                    message_id=message_id(key), status="pending", attempts=0, next_attempt_at=now,
                    created_at=now))
                queued += 1
        except IntegrityError:
            continue  # another sender queued it first
    return queued
