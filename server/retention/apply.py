"""Apply retention: delete the planned waveforms in bounded batches, each batch one short transaction.

Per batch, in one transaction: the candidates are checked again (a pin or a re-analysis queued since the
plan keeps its waveform), one audit row lists the batch (record ids, bytes, horizon), every reading gets
its ``waveform_removals`` marker, and the waveforms are deleted. A crash or SIGKILL loses at most the
batch in flight, which rolls back whole: a reading never ends up without both its samples and its marker.
Running again continues where it stopped; a second run over the same data deletes nothing (idempotent).

The database must be at the newest schema (``Database.check_schema``): retention refuses to run on an
older one, whose rules or tables it might not know.
"""

from __future__ import annotations

import datetime as dt
import logging
from dataclasses import dataclass

from sqlalchemy import exists, insert, select

from server import audit
from server.retention.policy import Plan, plan, stored_bytes
from server.retention.tables import RecordPin, WaveformRemoval
from server.storage.tables import Job, Waveform, utcnow
from server.storage.waveforms import store_for

log = logging.getLogger("halfwatch.retention")
REASON = "retention: older than the waveform horizon and held by no keep rule"


@dataclass
class Outcome:
    plan: Plan
    deleted: int = 0
    freed_bytes: int = 0
    batches: int = 0
    skipped: int = 0  # planned, but kept at delete time (pinned or queued since the plan)


def delete_waveforms(s, record_ids: list[int]) -> int:
    """Delete the stored waveforms of these readings inside the caller's transaction (``s``: the Session);
    the bytes freed. The one place retention removes samples: the waveform store's delete
    (server/storage/waveforms.py; files of the files backend are unlinked once the transaction commits)."""
    return store_for(s).delete_many(s, record_ids)


def _batch(db, ids: list[int], horizon: dt.datetime, actor: str, now: dt.datetime) -> tuple[int, int]:
    with db.unit_of_work() as s:
        conn = s.connection()
        rows = conn.execute(
            select(Waveform.record_id, stored_bytes()).where(
                Waveform.record_id.in_(ids),
                ~exists().where(RecordPin.record_id == Waveform.record_id),
                ~exists().where(Job.record_id == Waveform.record_id, Job.state.in_(("queued", "running"))))
            .order_by(Waveform.record_id)).all()
        if not rows:
            return 0, 0
        keep = [r[0] for r in rows]
        freed = sum(int(r[1] or 0) for r in rows)
        change = audit.record(s, actor=actor, action="delete", target="waveform", target_id=None,
                              record_ids=keep, bytes=freed, horizon=horizon.isoformat(), reason=REASON)
        s.flush()
        conn.execute(insert(WaveformRemoval), [
            {"record_id": rid, "removed_at": now, "removed_bytes": int(nb or 0), "reason": REASON,
             "audit_id": change.id} for rid, nb in rows])
        delete_waveforms(s, keep)
        return len(keep), freed


def run(db, settings, *, now: dt.datetime | None = None, dry_run: bool = False, actor: str = "retention",
        max_batches: int | None = None, on_batch=None) -> Outcome:
    """Plan, then (unless ``dry_run``) delete in batches of ``settings.retention_batch``.

    ``on_batch(outcome)`` is called after each committed batch (progress output, tests)."""
    db.check_schema()
    now = now or utcnow()
    p = plan(db, settings, now=now)
    out = Outcome(plan=p)
    if dry_run:
        return out
    ids = [rid for rid, _ in p.delete]
    size = settings.retention_batch
    for start in range(0, len(ids), size):
        if max_batches is not None and out.batches >= max_batches:
            break
        chunk = ids[start:start + size]
        n, freed = _batch(db, chunk, p.horizon, actor, now)
        out.deleted += n
        out.freed_bytes += freed
        out.skipped += len(chunk) - n
        out.batches += 1
        if on_batch is not None:
            on_batch(out)
    log.info("retention: %d waveforms deleted (%d bytes) in %d batches", out.deleted, out.freed_bytes,
             out.batches)
    return out
