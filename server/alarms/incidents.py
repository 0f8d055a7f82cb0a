"""One incident per machine: the rules of all its points grouped, one email per escalation, one clear.

An incident opens when the first rule of any point of a machine leaves normal and clears when every
rule of the machine is back to normal (``alarm_incidents``, migration 0009). Its level is the highest
level of its rules now. Emails follow the incident, not the rules:

* an **escalation** email goes out when the highest level among the machine's rules that are not
  shelved rises above the highest level already announced for this incident (alert, then danger): it
  lists every rule of the machine at its level;
* a rule that joins at a level already announced, or a drop from danger to alert, is in the audit trail,
  on the alarms page and in the digest, not in anyone's inbox;
* a **clear** email goes out once, when the incident clears, to those who were told about it.

Called by :mod:`.evaluate` in the worker's transaction, only for a record that changed a level.
"""

from __future__ import annotations

import datetime as dt
from types import SimpleNamespace

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.storage.tables import Asset, Point

from .notify import matching_subscriptions, message_id
from .rules import LEVEL_RANK, LEVELS, METRICS, rule_label
from .tables import AlarmIncident, AlarmPointStatus, AlarmState, OutboxMessage


def machine_rules(session: Session, asset_id: int, now: dt.datetime) -> list[dict]:
    """Every rule state of the machine that is not normal, worst first, as an email or page lists it."""
    rows = session.execute(
        select(AlarmState.id, AlarmState.metric, AlarmState.level, AlarmState.point_id, AlarmState.last_value,
               AlarmState.since, AlarmState.shelved_until, AlarmState.acked_level, Point.name,
               AlarmPointStatus.last_metrics)
        .join(Point, Point.id == AlarmState.point_id)
        .outerjoin(AlarmPointStatus, AlarmPointStatus.point_id == AlarmState.point_id)
        .where(AlarmState.asset_id == asset_id, AlarmState.level != "normal")
    ).all()
    out = []
    for sid, metric, level, point_id, last_value, since, shelved_until, acked, point, latest in rows:
        latest = latest or {}
        value = latest.get(metric, last_value)
        info = METRICS.get(metric)
        out.append({
            "id": sid, "metric": metric, "level": level, "point_id": point_id, "point": point,
            "rule": rule_label(metric, latest.get("line_class"), latest.get("line_order")),
            "value": value, "unit": info.unit if info else "",
            "since": since.isoformat() if since else None,
            "shelved": shelved_until is not None and shelved_until > now, "acknowledged": bool(acked),
        })
    out.sort(key=lambda r: (-LEVEL_RANK[r["level"]], r["point"], r["metric"]))
    return out


def open_incident(session: Session, asset_id: int) -> AlarmIncident | None:
    return session.scalars(select(AlarmIncident).where(AlarmIncident.asset_id == asset_id,
                                                       AlarmIncident.cleared_at.is_(None))).first()


def _max_level(levels) -> str:
    return LEVELS[max((LEVEL_RANK[x] for x in levels), default=0)]


def after_transitions(session: Session, where: dict, events: list, *, record_id: int | None,
                      now: dt.datetime) -> list[OutboxMessage]:
    """Update the machine's incident after the transitions of one record; queue its emails.

    ``events`` are the record's transition events (flushed, with ids), the most severe first is not
    required. Returns the outbox rows added."""
    asset_id = where["asset_id"]
    if session.get_bind().dialect.name == "postgresql":
        # two workers storing records of two points of one machine take turns here (the point rows are
        # locked per point only), so the second sees the incident the first opened or raised
        session.execute(select(Asset.id).where(Asset.id == asset_id).with_for_update(key_share=True))
    rules = machine_rules(session, asset_id, now)
    level = _max_level(r["level"] for r in rules)
    announce = _max_level(r["level"] for r in rules if not r["shelved"])
    incident = open_incident(session, asset_id)
    if incident is None:
        if level == "normal":
            return []
        # Rules already open before incidents existed (a database upgraded to 0009) were emailed then:
        # an incident first seen on a drop starts as announced, so the drop sends nothing.
        rising = any(LEVEL_RANK[e.to_level] > LEVEL_RANK[e.from_level] for e in events)
        incident = AlarmIncident(asset_id=asset_id, area_id=where.get("area_id"),
                                 site_id=where.get("site_id"), level=level, peak_level=level,
                                 announced_level="normal" if rising else announce, opened_at=now,
                                 opened_record_id=record_id, emails=0)
        session.add(incident)
        session.flush()
    incident.level, incident.last_record_id, incident.updated_at = level, record_id, now
    if LEVEL_RANK[level] > LEVEL_RANK[incident.peak_level]:
        incident.peak_level = level
    rows: list[OutboxMessage] = []
    ordered = sorted(events, key=lambda e: (-max(LEVEL_RANK[e.from_level], LEVEL_RANK[e.to_level]), e.id))
    if level == "normal":
        incident.cleared_at = now
        if incident.announced_level != "normal":
            rows = _queue(session, incident, where, ordered, rules, change="clear",
                          min_rank=LEVEL_RANK[incident.announced_level], now=now)
    elif LEVEL_RANK[announce] > LEVEL_RANK[incident.announced_level]:
        rows = _queue(session, incident, where, ordered, rules, change=announce,
                      min_rank=LEVEL_RANK[announce], now=now)
        incident.announced_level = announce
    incident.emails = (incident.emails or 0) + len(rows)
    return rows


def _queue(session: Session, incident: AlarmIncident, where: dict, events: list, rules: list[dict], *,
           change: str, min_rank: int, now: dt.datetime) -> list[OutboxMessage]:
    """One outbox row per address subscribed to the machine at or below the level concerned.

    For an escalation the level concerned is the new level; for a clear, the highest level announced
    (who was told about the incident hears that it is over)."""
    scope = SimpleNamespace(site_id=where.get("site_id"), area_id=where.get("area_id"),
                            asset_id=where["asset_id"])
    first = events[0]
    rows, seen = [], set()
    for sub in matching_subscriptions(session, scope):
        if LEVEL_RANK[sub.min_level] > min_rank:
            continue
        address = sub.email.strip().lower()
        if address in seen:
            continue
        seen.add(address)
        key = f"incident:{incident.id}:{change}:{address}"
        payload = {"incident": {"id": incident.id, "change": change, "level": incident.level,
                                "peak_level": incident.peak_level,
                                "opened_at": incident.opened_at.isoformat()},
                   "event_ids": [e.id for e in events], "rules": rules}
        rows.append(OutboxMessage(
            dedupe_key=key, kind="incident", event_id=first.id, subscription_id=sub.id, recipient=address,
            payload=payload, message_id=message_id(key), status="pending", attempts=0, next_attempt_at=now,
            created_at=now))
    session.add_all(rows)
    return rows

