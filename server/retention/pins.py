"""Pins (an engineer keeps a reading's raw waveform whatever its age) and a reading's retention state."""

from __future__ import annotations

from server import audit
from server.errors import Conflict, NotFound
from server.retention.tables import RecordPin, WaveformRemoval
from server.storage.queries import get_record, iso
from server.storage.tables import Waveform, utcnow


def state(s, settings, record_id: int) -> dict:
    """The reading's waveform (kept or removed, when, bytes), its pin and the keep rules that hold it."""
    from server.retention.policy import protected_reasons

    rec = get_record(s, record_id)
    gone = s.get(WaveformRemoval, record_id)
    pin = s.get(RecordPin, record_id)
    kept = s.get(Waveform, record_id) is not None
    return {"ok": True, "record_id": record_id,
            "waveform": {"kept": kept, "removed_at": iso(gone.removed_at) if gone else None,
                         "removed_bytes": gone.removed_bytes if gone else None,
                         "reason": gone.reason if gone else None},
            "pin": None if pin is None else {"pinned_by": pin.pinned_by, "pinned_at": iso(pin.pinned_at),
                                             "note": pin.note},
            "kept_by": protected_reasons(s, settings, rec) if kept else [],
            "horizon_days": settings.retention_waveform_days}


def pin(db, record_id: int, *, actor: str, note: str) -> dict:
    with db.unit_of_work() as s:
        get_record(s, record_id)
        if s.get(Waveform, record_id) is None:
            raise Conflict(f"reading {record_id} has no raw waveform left to keep (removed by retention); "
                           "its result and spectrum are kept anyway", field="record_id")
        if s.get(RecordPin, record_id) is not None:
            raise Conflict(f"reading {record_id} is already pinned; unpin it first to change the note",
                           field="record_id")
        s.add(RecordPin(record_id=record_id, pinned_by=actor[:120], pinned_at=utcnow(), note=note))
        audit.record(s, actor=actor, action="pin", target="record", target_id=record_id, note=note)
    return {"ok": True, "record_id": record_id, "pinned": True}


def unpin(db, record_id: int, *, actor: str) -> dict:
    with db.unit_of_work() as s:
        get_record(s, record_id)
        row = s.get(RecordPin, record_id)
        if row is None:
            raise NotFound(f"reading {record_id} is not pinned", field="record_id")
        audit.record(s, actor=actor, action="unpin", target="record", target_id=record_id,
                     pinned_by=row.pinned_by, note=row.note)
        s.delete(row)
    return {"ok": True, "record_id": record_id, "pinned": False}
