"""Records from files (WAV, CSV, UFF-58) through the analysis core's readers."""

from __future__ import annotations

import datetime as dt

from server.errors import AppError, NotFound
from server.services.ingest import IngestOutcome, Limits, ingest_record
from server.storage.tables import Point


def read_file(data: bytes, filename: str, *, units: str | None, fs_hz: float | None,
              tach_channel: int | None = None):
    """The analysis core's readers (SignalError for a bad file); ``tach_channel`` (from 1) comes back in
    ``Recording.tach``."""
    from analysis.record.io import read_any

    if not data:
        raise AppError("the file is empty", field="file")
    return read_any(data, filename, units=units, sample_rate_hz=fs_hz, tach_channel=tach_channel)


def ingest_file(db, *, point_id: int, data: bytes, filename: str, measured_at: dt.datetime | None,
                units: str | None, fs_hz: float | None, origin: str, uploader: str, limits: Limits,
                site_scope: int | None = None, session=None, tach_file_channel: int | None = None,
                **extra) -> IngestOutcome:
    """Read a file and ingest its record; ``tach_file_channel`` names the file's channel (from 1) that
    holds tach pulses (checked and stored with the record, server/tach)."""
    if units is None:  # the file may not say: the point's configured sensor units
        with db.read() as s:
            point = s.get(Point, point_id)
            if point is None:
                raise NotFound(f"no measurement point {point_id}; see GET /api/v1/tree", field="point_id")
            units = point.units
    rec = read_file(data, filename, units=units, fs_hz=fs_hz, tach_channel=tach_file_channel)
    if rec.tach is not None:
        extra.update(tach_samples=rec.tach, tach_field="tach_channel")
    meta = getattr(rec, "meta", {}) or {}
    when = measured_at or meta.get("measured_at")
    if when is None:
        raise AppError("measured_at is missing and the file does not carry a start time; give measured_at",
                       field="measured_at", status=422, code="invalid")
    if isinstance(when, str):
        try:
            when = dt.datetime.fromisoformat(when)
        except ValueError:
            raise AppError(f"the file's start time {when!r} is not ISO 8601; give measured_at",
                           field="measured_at") from None
    return ingest_record(db, point_id=point_id, samples=rec.samples, fs_hz=rec.fs_hz, units=rec.units,
                         measured_at=when, origin=origin, uploader=uploader, limits=limits,
                         site_scope=site_scope, source_name=filename[:255], source_bytes=data,
                         session=session, **extra)
