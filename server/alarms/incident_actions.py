"""Incidents for the API: open alarms grouped per machine, and acknowledging or shelving all of a
machine's open rules at once (each rule still gets its own audit event, marked ``scope: incident``).

The incident's identity in the API is its machine (``asset_id``): a machine has at most one open
incident. The worker keeps the ``alarm_incidents`` rows (:mod:`.incidents`); these actions work on the
machine's open rule states, so they also work for rules opened before migration 0009.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import func, select

from server.storage.tables import Asset, utcnow

from .rules import LEVEL_RANK
from .service import VIEWS, AlarmInputError, AlarmNotFound, _audit, _check_until, _level, _text, list_alarms
from .suggestions import ranked_causes
from .tables import AlarmEvent, AlarmIncident, AlarmState


def _rule_view(r: dict) -> str:
    return "shelved" if r["shelved"] else "acknowledged" if r["acknowledged"] else "active"


def _incident_state(rules: list[dict]) -> str:
    """"shelved" when every rule is shelved, "acknowledged" when each is acknowledged or shelved, else
    "active" (an incident with one rule nobody has seen yet is active)."""
    if all(r["shelved"] for r in rules):
        return "shelved"
    if all(r["acknowledged"] or r["shelved"] for r in rules):
        return "acknowledged"
    return "active"


def list_incidents(db, *, view: str = "active", site_id=None, area_id=None, asset_id=None, level=None,
                   now: dt.datetime | None = None) -> list[dict]:
    """Open alarms grouped per machine into incidents, the rules beneath, worst machine first.

    An incident's level is its worst rule's and its ``state`` is :func:`_incident_state`. ``view`` keeps
    the incidents with at least one rule in that view (active, acknowledged, shelved), all their rules
    beneath; ``level`` filters on the incident's level."""
    if view not in VIEWS:
        raise AlarmInputError("view", f"view: use one of {', '.join(VIEWS)}")
    _level(level)
    now = now or utcnow()
    rules = list_alarms(db, view="all", site_id=site_id, area_id=area_id, asset_id=asset_id, now=now)
    grouped: dict[int, list[dict]] = {}
    for r in rules:
        grouped.setdefault(r["asset_id"], []).append(r)
    with db.read() as s:
        opened = {i.asset_id: i for i in s.scalars(select(AlarmIncident).where(
            AlarmIncident.asset_id.in_(list(grouped)), AlarmIncident.cleared_at.is_(None)))
            } if grouped else {}
        causes = _likely_causes(s, grouped)
    out = []
    for aid, items in grouped.items():
        items.sort(key=lambda r: (-LEVEL_RANK[r["level"]], r["point"], r["rule"]))
        top = items[0]["level"]
        state = _incident_state(items)
        if level and top != level:
            continue
        if view != "all" and not any(_rule_view(r) == view for r in items):
            continue
        inc = opened.get(aid)
        first = min(r["since"] for r in items)
        out.append({
            "asset_id": aid, "asset": items[0]["asset"], "area_id": items[0]["area_id"],
            "area": items[0]["area"], "site_id": items[0]["site_id"], "level": top, "state": state,
            "incident_id": inc.id if inc else None,
            "opened_at": inc.opened_at.isoformat() if inc else first,
            "announced_level": inc.announced_level if inc else None,
            "rules_at_level": sum(r["level"] == top for r in items), "rules": items,
            "cause": causes.get(aid),
        })
    out.sort(key=lambda d: (-LEVEL_RANK[d["level"]], -d["rules_at_level"], d["opened_at"], d["asset"]))
    return out


def _likely_causes(s, grouped: dict[int, list[dict]]) -> dict[int, dict]:
    """Per machine, the best-supported cause from the snapshot of its latest transition (the same ranking
    as the email: :func:`server.alarms.suggestions.ranked_causes`)."""
    if not grouped:
        return {}
    latest = (select(func.max(AlarmEvent.id)).where(AlarmEvent.asset_id.in_(list(grouped)),
                                                     AlarmEvent.kind == "transition")
              .group_by(AlarmEvent.asset_id))
    out = {}
    for e in s.scalars(select(AlarmEvent).where(AlarmEvent.id.in_(latest))):
        d = e.details or {}
        at = e.created_at if e.created_at.tzinfo else e.created_at.replace(tzinfo=dt.UTC)
        best = ranked_causes(d.get("finding") or {}, d.get("metrics") or {}, d.get("evidence") or {}, at=at,
                             rules=[r["metric"] for r in grouped.get(e.asset_id, [])])[0]
        out[e.asset_id] = {"title": best.title, "why": list(best.why), "action": best.action}
    return out


def _machine_states(s, asset_id: int) -> tuple[Asset, list[AlarmState]]:
    asset = s.get(Asset, asset_id)
    if asset is None:
        raise AlarmNotFound(f"machine {asset_id}")
    states = s.scalars(select(AlarmState).where(AlarmState.asset_id == asset_id, AlarmState.level != "normal")
                       .order_by(AlarmState.id)).all()
    if not states:
        raise AlarmInputError("asset_id", f"{asset.name} has no open alarm; nothing to do", status=409)
    return asset, list(states)


def acknowledge_incident(db, asset_id: int, *, actor: str, comment: str,
                         now: dt.datetime | None = None) -> dict:
    """Acknowledge every open rule of a machine not yet acknowledged at its level (one audit event each)."""
    comment = _text(comment, "comment", "a comment saying what is being done")
    now = now or utcnow()
    with db.unit_of_work() as s:
        asset, states = _machine_states(s, asset_id)
        events = []
        for state in states:
            if state.acked_level == state.level:
                continue
            state.acked_level, state.acked_by, state.acked_at = state.level, actor, now
            state.ack_comment = comment
            events.append(_audit(s, state, "acknowledged", actor, comment, now, scope="incident"))
        return {"asset_id": asset.id, "asset": asset.name, "changed": len(events), "events": events}


def shelve_incident(db, asset_id: int, *, actor: str, until: dt.datetime, reason: str,
                    now: dt.datetime | None = None) -> dict:
    """Shelve every open rule of a machine until ``until`` (one audit event each)."""
    reason = _text(reason, "reason", "a reason")
    now = now or utcnow()
    _check_until(until, now)
    with db.unit_of_work() as s:
        asset, states = _machine_states(s, asset_id)
        events = []
        for state in states:
            state.shelved_until, state.shelve_reason, state.shelved_by = until, reason, actor
            state.shelved_level = state.level
            events.append(_audit(s, state, "shelved", actor, reason, now, until=until.isoformat(),
                                 scope="incident"))
        return {"asset_id": asset.id, "asset": asset.name, "changed": len(events), "events": events}


def unshelve_incident(db, asset_id: int, *, actor: str, now: dt.datetime | None = None) -> dict:
    now = now or utcnow()
    with db.unit_of_work() as s:
        asset, states = _machine_states(s, asset_id)
        events = []
        for state in states:
            if state.shelved_until is None:
                continue
            state.shelved_until = state.shelve_reason = state.shelved_by = state.shelved_level = None
            events.append(_audit(s, state, "unshelved", actor, "shelving ended", now, scope="incident"))
        return {"asset_id": asset.id, "asset": asset.name, "changed": len(events), "events": events}
