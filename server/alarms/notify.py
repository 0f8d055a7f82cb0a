"""Subscriptions -> outbox rows, in the same transaction as the events they announce.

One email per recipient and record: the transitions one record causes go out together, keyed by the
most severe event (``alarm:{event_id}:{address}``), so each event reaches each address once and a
burst of rule changes does not flood anyone. Shelved states queue nothing (the caller filters).
"""

from __future__ import annotations

import datetime as dt
import hashlib

from sqlalchemy import or_, select
from sqlalchemy.orm import Session

from .rules import LEVEL_RANK
from .tables import AlarmEvent, AlarmSubscription, OutboxMessage


def message_id(dedupe_key: str) -> str:
    """A stable Message-ID, so a receiving system can drop a copy sent after a crash mid-send."""
    digest = hashlib.sha256(dedupe_key.encode()).hexdigest()[:32]
    return f"<{digest}@halfwatch.alarms>"


def _severity(event: AlarmEvent) -> int:
    if event.kind != "transition":
        return 0
    return max(LEVEL_RANK[event.from_level], LEVEL_RANK[event.to_level])


def matching_subscriptions(session: Session, event: AlarmEvent, *, mode: str = "immediate"):
    scopes = [("site", event.site_id), ("area", event.area_id), ("asset", event.asset_id)]
    clauses = [(AlarmSubscription.scope == s) & (AlarmSubscription.scope_id == i) for s, i in scopes if i]
    return session.scalars(
        select(AlarmSubscription)
        .where(AlarmSubscription.active.is_(True), AlarmSubscription.mode == mode, or_(*clauses))
        .order_by(AlarmSubscription.id)
    ).all()


def queue_for_events(session: Session, events: list[AlarmEvent], *, now: dt.datetime) -> list[OutboxMessage]:
    """Add outbox rows for ``events`` (all from one record); returns the rows added."""
    if not events:
        return []
    per_recipient: dict[str, tuple[AlarmSubscription, list[AlarmEvent]]] = {}
    subscribers: dict[tuple, list[AlarmSubscription]] = {}  # one query per scope (one for a record's events)
    for event in events:
        scope = (event.site_id, event.area_id, event.asset_id)
        if scope not in subscribers:
            subscribers[scope] = matching_subscriptions(session, event)
        for sub in subscribers[scope]:
            if event.kind == "data-quality":
                if not sub.include_data_quality:
                    continue
            elif _severity(event) < LEVEL_RANK[sub.min_level]:
                continue
            address = sub.email.strip().lower()
            entry = per_recipient.setdefault(address, (sub, []))
            if event not in entry[1]:
                entry[1].append(event)
    rows = []
    for address, (sub, evs) in per_recipient.items():
        evs.sort(key=lambda e: (-_severity(e), e.id))
        key = f"alarm:{evs[0].id}:{address}"
        rows.append(
            OutboxMessage(
                dedupe_key=key, kind="alarm", event_id=evs[0].id, subscription_id=sub.id, recipient=address,
                payload={"event_ids": [e.id for e in evs]}, message_id=message_id(key), status="pending",
                attempts=0, next_attempt_at=now, created_at=now,
            )
        )
    session.add_all(rows)
    return rows
