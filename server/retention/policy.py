"""Which raw waveforms retention may delete, and which keep rule holds each of the others.

A waveform is a deletion candidate when its reading was measured before the horizon (now minus
``retention_waveform_days``), has a current analysis result and no analysis pending. A candidate is kept
when any rule holds it (the first that applies names the reason):

- ``pinned``: an engineer pinned the reading from the reading page;
- ``alarm``: the reading of an alarm event (transition or data-quality), or one of the
  ``retention_alarm_neighbours`` readings of the same point before and after an alarm transition;
- ``daily-first``: the first reading of its point on that day (in the site's time zone);
- ``route-walk``: a route reading of the point's newest walk (route readings within ``WALK_SPAN`` of the
  point's newest route reading), kept until the next walk reaches that point.

Readings without a result (failed or never analysed) are never candidates: their waveform is all there is.
Everything here only reads; :mod:`server.retention.apply` deletes.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from dataclasses import dataclass, field
from zoneinfo import ZoneInfo

from sqlalchemy import and_, exists, func, or_, select

from server.alarms.tables import AlarmEvent
from server.retention.tables import RecordPin
from server.storage.tables import Area, Asset, Job, Point, Record, Result, Site, Waveform, utcnow

WALK_SPAN = dt.timedelta(hours=24)  # house choice: one walk reaches a point within a day
KEEP_REASONS = ("pinned", "alarm", "daily-first", "route-walk")


@dataclass
class Plan:
    horizon: dt.datetime
    delete: list[tuple[int, int]] = field(default_factory=list)  # (record id, stored bytes), by id
    kept: Counter = field(default_factory=Counter)  # reason -> readings past the horizon kept
    kept_bytes: Counter = field(default_factory=Counter)
    not_candidates: Counter = field(default_factory=Counter)  # "no result", "analysis pending"

    @property
    def delete_bytes(self) -> int:
        return sum(b for _, b in self.delete)

    def summary(self) -> dict:
        return {"horizon": self.horizon.isoformat(), "delete_waveforms": len(self.delete),
                "delete_bytes": self.delete_bytes, "kept": dict(self.kept),
                "kept_bytes": dict(self.kept_bytes),
                "not_candidates": dict(self.not_candidates)}


def stored_bytes():
    """SQL: the bytes a waveform row holds (samples plus the uploaded file, if kept)."""
    return func.length(Waveform.data) + func.coalesce(func.length(Waveform.source_bytes), 0)


def _old_waveforms(s, horizon: dt.datetime):
    has_result = exists().where(Result.record_id == Record.id, Result.current.is_(True))
    pending = exists().where(Job.record_id == Record.id, Job.state.in_(("queued", "running")))
    pinned = exists().where(RecordPin.record_id == Record.id)
    return s.execute(
        select(Record.id, Record.point_id, Record.measured_at, stored_bytes(), has_result, pending, pinned)
        .join(Waveform, Waveform.record_id == Record.id)
        .where(Record.measured_at < horizon).order_by(Record.point_id, Record.measured_at, Record.id)
    ).all()


def _zones(s, point_ids, settings) -> dict[int, ZoneInfo]:
    rows = s.execute(select(Point.id, Site.name).join(Asset, Asset.id == Point.asset_id)
                     .join(Area, Area.id == Asset.area_id).join(Site, Site.id == Area.site_id)
                     .where(Point.id.in_(point_ids))).all()
    return {pid: ZoneInfo(settings.site_timezones.get(name, settings.site_timezone)) for pid, name in rows}


def _neighbours(s, point_id: int, at: dt.datetime, rid: int, n: int) -> list[int]:
    """The n readings of the point before and the n after reading ``rid`` (measured ``at``)."""
    if n <= 0:
        return []
    base = select(Record.id).where(Record.point_id == point_id)
    before = base.where(or_(Record.measured_at < at, and_(Record.measured_at == at, Record.id < rid)))
    after = base.where(or_(Record.measured_at > at, and_(Record.measured_at == at, Record.id > rid)))
    return [*s.scalars(before.order_by(Record.measured_at.desc(), Record.id.desc()).limit(n)),
            *s.scalars(after.order_by(Record.measured_at, Record.id).limit(n))]


def _alarm_kept(s, point_id: int, n: int) -> set[int]:
    rows = s.execute(select(AlarmEvent.record_id, AlarmEvent.kind, Record.measured_at)
                     .join(Record, Record.id == AlarmEvent.record_id)
                     .where(AlarmEvent.point_id == point_id, AlarmEvent.record_id.is_not(None))).all()
    out = set()
    for rid, kind, at in {(r[0], r[1], r[2]) for r in rows}:
        out.add(rid)
        if kind == "transition":
            out.update(_neighbours(s, point_id, at, rid, n))
    return out


def _daily_firsts(s, point_id: int, first: dt.datetime, last: dt.datetime, zone: ZoneInfo) -> set[int]:
    """The first reading of each local day of the point that has a reading between first and last."""
    lo, hi = first - dt.timedelta(days=1, hours=14), last + dt.timedelta(hours=14)  # any zone's day edges
    seen, out = set(), set()
    for rid, at in s.execute(select(Record.id, Record.measured_at)
                             .where(Record.point_id == point_id, Record.measured_at >= lo,
                                    Record.measured_at <= hi)
                             .order_by(Record.measured_at, Record.id)):
        day = at.astimezone(zone).date()
        if day not in seen:
            seen.add(day)
            out.add(rid)
    return out


def _walk_kept(s, point_id: int) -> set[int]:
    newest = s.scalar(select(func.max(Record.measured_at))
                      .where(Record.point_id == point_id, Record.origin == "route"))
    if newest is None:
        return set()
    if newest.tzinfo is None:
        newest = newest.replace(tzinfo=dt.UTC)
    return set(s.scalars(select(Record.id).where(Record.point_id == point_id, Record.origin == "route",
                                                 Record.measured_at >= newest - WALK_SPAN)))


def plan(db, settings, *, now: dt.datetime | None = None) -> Plan:
    """What retention would do now: the waveforms to delete and, by reason, those it keeps."""
    now = now or utcnow()
    horizon = now - dt.timedelta(days=settings.retention_waveform_days)
    out = Plan(horizon=horizon)
    with db.read() as s:
        rows = _old_waveforms(s, horizon)
        by_point: dict[int, list] = {}
        for row in rows:
            by_point.setdefault(row[1], []).append(row)
        zones = _zones(s, list(by_point), settings)
        for point_id, prow in by_point.items():
            alarm = _alarm_kept(s, point_id, settings.retention_alarm_neighbours)
            firsts = _daily_firsts(s, point_id, prow[0][2], prow[-1][2],
                                   zones.get(point_id, ZoneInfo(settings.site_timezone)))
            walk = _walk_kept(s, point_id)
            for rid, _pid, _at, nbytes, has_result, pending, pinned in prow:
                nbytes = int(nbytes or 0)
                if not has_result:
                    out.not_candidates["no result"] += 1
                    continue
                if pending:
                    out.not_candidates["analysis pending"] += 1
                    continue
                reason = ("pinned" if pinned else "alarm" if rid in alarm else
                          "daily-first" if rid in firsts else "route-walk" if rid in walk else None)
                if reason is None:
                    out.delete.append((rid, nbytes))
                else:
                    out.kept[reason] += 1
                    out.kept_bytes[reason] += nbytes
    out.delete.sort()
    return out


def protected_reasons(s, settings, record) -> list[str]:
    """Every keep rule that holds this reading now (for the reading page), whatever its age."""
    reasons = []
    if s.get(RecordPin, record.id) is not None:
        reasons.append("pinned")
    if record.id in _alarm_kept(s, record.point_id, settings.retention_alarm_neighbours):
        reasons.append("alarm")
    zone = _zones(s, [record.point_id], settings).get(record.point_id, ZoneInfo(settings.site_timezone))
    if record.id in _daily_firsts(s, record.point_id, record.measured_at, record.measured_at, zone):
        reasons.append("daily-first")
    if record.id in _walk_kept(s, record.point_id):
        reasons.append("route-walk")
    return reasons
