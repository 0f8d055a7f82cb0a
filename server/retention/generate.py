"""Readings written straight into the tables (no ingest, no analysis): for retention tests and
bench/storage_year.py only, never used by the service.

Each reading gets a ``records`` row, a ``waveforms`` row (the given blob), a finished ``jobs`` row and a
current ``results`` row (the given JSON and chart blob), the way the worker leaves them. Alarm
transitions are ``alarm_events`` rows of kind ``transition`` pointing at their reading.
"""

from __future__ import annotations

import datetime as dt
import hashlib
from dataclasses import dataclass

from sqlalchemy import insert, select

from server.alarms.tables import AlarmEvent
from server.storage.tables import Job, Point, Record, Result, Waveform


@dataclass(frozen=True)
class Template:
    """What every generated reading stores: waveform blob (codec), result JSON and chart blob."""

    codec: str
    waveform: bytes
    data: str
    spectrum: bytes
    fs_hz: float = 448.0
    n_samples: int = 20480


def tiny_template() -> Template:
    """A small template for tests (a few hundred bytes per reading)."""
    import numpy as np

    from server.storage.blobs import encode_waveform
    from server.storage.packing import pack_chart

    x = np.sin(np.arange(256) * 0.3).astype("<f4")
    codec, blob = encode_waveform(x)
    chart = pack_chart({"units": "g", "amplitude": "peak"}, {("freqs_hz", "amplitude"): (
        np.arange(64.0), np.abs(np.sin(np.arange(64.0))) + 1e-3, 64)})
    return Template(codec, blob, '{"version":"2.0"}', chart, fs_hz=256.0, n_samples=256)


def add_readings(db, point_id: int, times: list[dt.datetime], template: Template, *, origin: str = "api",
                 transitions: tuple[int, ...] = (), batch: int = 500) -> list[int]:
    """Store one reading per time (in order) for the point; ``transitions`` are indices into ``times``
    whose readings get an alarm transition event. Returns the record ids."""
    with db.read() as s:
        asset_id = s.scalar(select(Point.asset_id).where(Point.id == point_id))
    ids: list[int] = []
    for start in range(0, len(times), batch):
        chunk = times[start:start + batch]
        with db.unit_of_work() as s:
            conn = s.connection()
            for i, t in enumerate(chunk, start):
                rid = conn.execute(insert(Record).returning(Record.id), {
                    "point_id": point_id, "measured_at": t, "received_at": t, "fs_hz": template.fs_hz,
                    "n_samples": template.n_samples, "units": "g", "speed_hz": None, "speed_source": None,
                    "origin": origin, "uploader": "generated",
                    "client_ref": f"gen:{point_id}:{t.isoformat()}",
                    "checksum": hashlib.sha256(f"{point_id}:{t.isoformat()}".encode()).hexdigest()}
                ).scalar_one()
                ids.append(rid)
                conn.execute(insert(Waveform), {"record_id": rid, "codec": template.codec,
                                                "data": template.waveform, "source_name": None,
                                                "source_bytes": None})
                conn.execute(insert(Job), {"record_id": rid, "state": "done", "attempts": 1, "not_before": t,
                                           "reason": "ingest", "created_at": t, "finished_at": t})
                res = conn.execute(insert(Result).returning(Result.id), {
                    "record_id": rid, "point_id": point_id, "measured_ts": t.timestamp(),
                    "analysis_version": "2.0", "current": True, "created_at": t, "data": template.data,
                    "spectrum": template.spectrum, "sub_detected": False, "quality_ok": True,
                    "overall_velocity_rms_mm_s": 1.0, "sub_velocity_rms_mm_s": 0.05}).scalar_one()
                if i in transitions:
                    conn.execute(insert(AlarmEvent), {
                        "kind": "transition", "point_id": point_id, "asset_id": asset_id, "metric": "overall",
                        "from_level": "normal", "to_level": "alert", "record_id": rid, "result_id": res,
                        "actor": "worker", "summary": "generated transition", "details": {}, "created_at": t})
    return ids
