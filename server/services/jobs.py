"""Queue maintenance: re-analysis after a method upgrade."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import exists, select

from server.storage.tables import Job, Record, Waveform


def requeue_since(db, since: dt.datetime, *, point_id: int | None = None) -> int:
    """Queue a fresh analysis for every record measured at or after ``since`` that has none pending."""
    return requeue_report(db, since, point_id=point_id)[0]


def requeue_report(db, since: dt.datetime, *, point_id: int | None = None) -> tuple[int, int]:
    """(records queued, records skipped because retention removed their raw waveform)."""
    with db.unit_of_work() as s:
        pending = select(Job.record_id).where(Job.state.in_(("queued", "running")))
        q = select(Record.id, exists().where(Waveform.record_id == Record.id)).where(
            Record.measured_at >= since, Record.id.not_in(pending))
        if point_id is not None:
            q = q.where(Record.point_id == point_id)
        rows = s.execute(q.order_by(Record.id)).all()
        ids = [rid for rid, has_waveform in rows if has_waveform]
        s.add_all([Job(record_id=i, state="queued", reason="reanalyze") for i in ids])
        return len(ids), len(rows) - len(ids)
