"""Helpers for the alarm tests: analysis JSON with chosen values, and a worker-like feeder."""

from __future__ import annotations

import asyncio
import datetime as dt
import json
import threading

from aiosmtpd.controller import Controller
from support.servers import free_port


def make_result(*, half_v: float = 0.0, f1x: float = 24.75, one_x_v: float = 20.0, overall: float = 1.0,
                growth: float | None = None, ci: tuple | None = None, flags: tuple = (), ok: bool = True,
                klass: str = "half-order", family: dict | None = None, zone_limits=(1.4, 2.8, 4.5)) -> dict:
    """An analysis JSON in the shape of ``RecordAnalysis.to_dict()`` version 2.0 (invented values for tests).

    ``half_v``, ``one_x_v`` and ``overall`` are velocities r.m.s. in mm/s (what the rules compare)."""
    detected = half_v > 0
    zone = "A" if overall < zone_limits[0] else "B" if overall < zone_limits[1] else \
        "C" if overall < zone_limits[2] else "D"
    return {
        "version": "2.0",
        "units": "m/s2",
        "forcing": {"frequency_hz": f1x, "source": "refined", "nominal_hz": f1x},
        "subharmonic": {"detected": detected, "class": klass if detected else "none",
                        "frequency_hz": f1x / 2 if detected else None, "order": 0.5 if detected else None,
                        "accel_peak": half_v * 0.1 if detected else None,
                        # a sine: peak = r.m.s. x sqrt 2
                        "velocity_peak_mm_s": half_v * SQRT2 if detected else None,
                        "velocity_rms_mm_s": half_v if detected else None,
                        "snr_db": 20.0 if detected else None,
                        "family": family or {"1.5X": None, "2.5X": None}},
        "growth": {"rate_per_s": growth, "ci95_per_s": list(ci) if ci else [None, None], "onset_s": None,
                   "state": "growing" if growth and ci and ci[0] > 0 else "steady"},
        "overall": {"velocity_rms_mm_s": overall, "zone": zone, "zone_limits_rms_mm_s": list(zone_limits)},
        "orders": {"1X": {"frequency_hz": f1x, "accel_peak": one_x_v * 0.1,
                          "velocity_peak_mm_s": one_x_v * SQRT2, "velocity_rms_mm_s": one_x_v},
                   "2X": {"frequency_hz": 2 * f1x, "accel_peak": 0.01, "velocity_peak_mm_s": 0.2,
                          "velocity_rms_mm_s": 0.2 / SQRT2}},
        "waveform": {"accel_rms": 1.0, "accel_peak": 3.0, "crest_factor": 3.0, "kurtosis": 3.0},
        "quality": {"ok": ok, "flags": list(flags)},
    }


SQRT2 = 2 ** 0.5
T0 = dt.datetime(2026, 11, 2, 6, 0, tzinfo=dt.UTC)


class Feeder:
    """Stores record + result rows and evaluates the alarms in the same transaction, as the worker does."""

    def __init__(self, db, settings):
        self.db, self.settings, self.n = db, settings, 0

    def feed(self, point_id: int, data: dict, *, at: dt.datetime | None = None) -> list:
        from analysis.results import RecordAnalysis
        from server.alarms import evaluate_result
        from server.storage.result_columns import result_columns
        from server.storage.tables import Record, Result

        self.n += 1
        at = at or T0 + dt.timedelta(hours=6 * self.n)
        with self.db.unit_of_work() as s:
            rec = Record(point_id=point_id, measured_at=at, fs_hz=2560.0, n_samples=25600, units="m/s2",
                         origin="api", uploader="test", checksum=f"{self.n:064x}")
            s.add(rec)
            s.flush()
            res = Result(record_id=rec.id, point_id=point_id, measured_ts=at.timestamp(),
                         analysis_version="test", data=json.dumps(data), spectrum=b"",
                         **result_columns(RecordAnalysis.from_dict(data)))
            s.add(res)
            s.flush()
            events = evaluate_result(s, rec, res, settings=self.settings, now=at)
            return [(e.id, e.kind, e.metric, e.from_level, e.to_level) for e in events]


def run_senders(db, settings, *, n: int = 2, batch: int = 3) -> list[int]:
    """Start ``n`` senders at the same moment (threads); returns how many emails each one sent."""
    import threading

    from server.alarms.mailer import claim, send_claimed

    barrier, counts = threading.Barrier(n), []

    def sender(name):
        barrier.wait()
        total = 0
        while ids := claim(db, me=name, lease_s=30, batch=batch):
            total += send_claimed(db, settings, ids, me=name)
        counts.append(total)

    threads = [threading.Thread(target=sender, args=(f"s{i}",)) for i in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    return counts


def assert_audit_trail_immutable(db) -> None:
    """UPDATE and DELETE on alarm_events fail with the trigger's message."""
    import pytest
    from sqlalchemy import text
    from sqlalchemy.exc import DatabaseError

    for sql in ("UPDATE alarm_events SET value = 0", "DELETE FROM alarm_events"):
        with pytest.raises(DatabaseError, match="audit trail"):
            with db.unit_of_work() as s:
                s.execute(text(sql))


class RecordingHandler:
    """Keeps every message; ``hold`` makes RCPT wait (a server that stalls mid-exchange)."""

    def __init__(self):
        self.messages: list[dict] = []
        self.hold = threading.Event()
        self.rcpt_seen = threading.Event()
        self.lock = threading.Lock()

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        self.rcpt_seen.set()
        while self.hold.is_set():
            await asyncio.sleep(0.02)
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        from email import message_from_bytes, policy

        msg = message_from_bytes(envelope.content, policy=policy.default)
        with self.lock:
            self.messages.append({"to": list(envelope.rcpt_tos), "msg": msg})
        return "250 Message accepted for delivery"


class SmtpServer:
    def __init__(self, **options):
        self.port = free_port()
        self.handler = RecordingHandler()
        self.controller = None
        self.options = options  # passed to aiosmtpd (TLS contexts, authenticator)

    def start(self):
        self.controller = Controller(self.handler, hostname="127.0.0.1", port=self.port, ready_timeout=10,
                                     **self.options)
        self.controller.start()

    def stop(self):
        if self.controller is not None:
            self.controller.stop()
            self.controller = None

    @property
    def messages(self):
        return self.handler.messages
