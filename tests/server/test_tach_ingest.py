"""Tach pulses through the service: JSON pulse times or a pulse channel, file uploads with a tach channel,
route ZIP rows; stored durably with the record (record_tach, migration 0010) and used by the worker.

Requests go to a real uvicorn on 127.0.0.1 (support.fixtures.live_server) over HTTP. The invented record:
a pump whose speed runs up 23.5 -> 26.0 Hz over 8 s with a 0.5X line locked at half the shaft angle. The
speed profile and its pulse times follow scipy.signal.chirp's linear sweep, phase
φ(t) = 2π (f0 t + (f1 - f0) t² / (2T)) (scipy docs of chirp); pulse k is where φ = 2π k.
"""

from __future__ import annotations

import base64
import io
import json
import zipfile

import httpx
import numpy as np
import pytest
from scipy import signal
from scipy.io import wavfile
from sqlalchemy import func, select

from server import worker
from server.storage.tables import Record, Result, utcnow
from server.tach.tables import RecordTach

FS, T, F0, F1 = 2560.0, 8.0, 23.5, 26.0
T0 = "2026-03-02T08:00:00Z"


def _record(seed=5):
    t = np.arange(int(FS * T)) / FS
    ph = 2 * np.pi * (F0 * t + 0.5 * (F1 - F0) / T * t * t)
    noise = 0.002 * np.random.default_rng(seed).standard_normal(t.size)
    accel = np.sin(ph) + 0.05 * np.sin(ph / 2 + 0.3) + noise  # m/s2
    a = 0.5 * (F1 - F0) / T
    k = np.arange(1, int(F0 * T + a * T * T))
    pulses = (-F0 + np.sqrt(F0 * F0 + 4 * a * k)) / (2 * a)  # φ(t_k) = 2π k (quadratic formula)
    tach = np.tanh(4.0 * signal.chirp(t, F0, T, F1, method="linear", phi=-90))  # rises through 0 at t_k
    return accel, pulses[pulses < t[-1]], tach


def _json(base, headers, point_id, **body):
    accel = body.pop("accel")
    doc = {"fs_hz": FS, "units": "m/s2", "measured_at": T0,
           "samples_b64": base64.b64encode(accel.astype("<f4").tobytes()).decode(), **body}
    return httpx.post(f"{base}/api/v1/points/{point_id}/records", json=doc, headers=headers, timeout=60)


def _count(db, table):
    with db.read() as s:
        return s.scalar(select(func.count()).select_from(table))


def _error(r, status, field):
    body = r.json()
    assert r.status_code == status, r.text
    assert body["ok"] is False and body["error"]["field"] == field, body
    return body["error"]["message"]


def test_json_pulse_times_are_stored_and_drive_the_order_tracking(live_server, plant, plant_key_headers,
                                                                  migrated_db, hw_settings):
    accel, pulses, _ = _record()
    r = _json(live_server, plant_key_headers, plant.point_id, accel=accel, tach_pulses_s=pulses.tolist())
    assert r.status_code == 201, r.text
    rid = r.json()["record_id"]
    with migrated_db.read() as s:
        row = s.get(RecordTach, rid)
        rec = s.get(Record, rid)
    # the times come back bit for bit (JSON numbers are IEEE doubles; float64 stored)
    assert np.array_equal(np.frombuffer(row.pulses, "<f8"), pulses)
    assert (row.pulses_per_rev, row.n_pulses, row.source) == (1, pulses.size, "times")
    # without speed_hz the record's speed is the pulses' mean speed: revolutions / time
    assert rec.speed_source == "tach"
    assert rec.speed_hz == pytest.approx((pulses.size - 1) / (pulses[-1] - pulses[0]), rel=1e-12)
    # the record answer says what the tach gave: per-revolution speeds span the ramp (1 / revolution time
    # = the ramp's speed at mid-revolution, exact for a linear ramp)
    got = httpx.get(f"{live_server}/api/v1/records/{rid}", headers=plant_key_headers).json()["tach"]
    assert got["n_pulses"] == pulses.size and got["source"] == "times" and got["pulses_per_rev"] == 1
    assert got["speed_min_hz"] == pytest.approx(F0, rel=5e-3)
    assert got["speed_max_hz"] == pytest.approx(F1, rel=5e-3)
    assert worker.run_once(migrated_db, hw_settings, "w1") is True
    with migrated_db.read() as s:
        data = json.loads(s.scalar(select(Result.data).where(Result.record_id == rid)))
    assert data["forcing"]["tracking"] == "tach"
    # computed order tracking (Fyfe & Munck 1997, MSSP 11(2)): the locked line reads 0.5 orders, its peak
    # 0.05 m/s2 by construction
    assert data["subharmonic"]["detected"] and data["subharmonic"]["order"] == pytest.approx(0.5, abs=2e-3)
    assert data["subharmonic"]["accel_peak"] == pytest.approx(0.05, rel=0.05)


def test_json_pulse_channel_is_turned_into_times(live_server, plant, plant_key_headers, migrated_db):
    accel, pulses, tach = _record()
    r = _json(live_server, plant_key_headers, plant.point_id, accel=accel, tach_samples=tach.tolist(),
              speed_hz=24.75)
    assert r.status_code == 201, r.text
    with migrated_db.read() as s:
        row = s.get(RecordTach, r.json()["record_id"])
        rec = s.get(Record, r.json()["record_id"])
    got = np.frombuffer(row.pulses, "<f8")
    assert row.source == "channel" and got.size == pulses.size
    assert np.max(np.abs(got - pulses)) < 0.05 / FS  # sub-sample edge times
    assert rec.speed_hz == pytest.approx(24.75) and rec.speed_source == "given"


def test_bad_tach_is_a_4xx_naming_the_field_and_nothing_is_stored(live_server, plant, plant_key_headers,
                                                                  migrated_db):
    accel, pulses, tach = _record()
    base, h, pid = live_server, plant_key_headers, plant.point_id
    msg = _error(_json(base, h, pid, accel=accel, tach_pulses_s=np.delete(pulses, 60).tolist()), 422,
                 "tach_pulses_s")
    assert "irregular" in msg and "±25 %" in msg
    msg = _error(_json(base, h, pid, accel=accel, tach_pulses_s=pulses[:3].tolist()), 422, "tach_pulses_s")
    assert "at least 5" in msg
    msg = _error(_json(base, h, pid, accel=accel, tach_samples=tach[:-10].tolist()), 422, "tach_samples")
    assert "same" in msg or "sample both together" in msg
    msg = _error(_json(base, h, pid, accel=accel, tach_samples=np.zeros(accel.size).tolist()), 422,
                 "tach_samples")
    assert "flat" in msg
    msg = _error(_json(base, h, pid, accel=accel, tach_pulses_s=pulses.tolist(), speed_hz=30.0), 400,
                 "speed_hz")  # the same status as the other speed_hz refusals (check_speed)
    assert "mean speed" in msg
    msg = _error(_json(base, h, pid, accel=accel, pulses_per_rev=2), 422, "pulses_per_rev")
    assert "tach_pulses_s" in msg
    _error(_json(base, h, pid, accel=accel, tach_pulses_s=pulses.tolist(), tach_samples=tach.tolist()), 422,
           "tach_pulses_s")
    _error(_json(base, h, pid, accel=accel, tach_pulses_s=pulses.tolist(), pulses_per_rev=0), 422,
           "pulses_per_rev")
    assert _count(migrated_db, Record) == _count(migrated_db, RecordTach) == 0


def _wav(accel, tach, drop=False):
    if drop:
        tach = tach.copy()
        tach[(np.arange(tach.size) / FS > 4.01) & (np.arange(tach.size) / FS < 4.01 + 1 / 24.0)] = -1.0
    buf = io.BytesIO()
    wavfile.write(buf, int(FS), np.column_stack([accel, tach]).astype(np.float32))  # scipy.io.wavfile
    return buf.getvalue()


def test_file_upload_with_a_tach_channel(live_server, plant, plant_key_headers, migrated_db):
    accel, pulses, tach = _record()
    url = f"{live_server}/api/v1/points/{plant.point_id}/records/file"

    def post(data, **form):
        return httpx.post(url, headers=plant_key_headers, files={"file": ("runup.wav", data, "audio/wav")},
                          data={"measured_at": T0, "units": "m/s2", **form}, timeout=60)

    r = post(_wav(accel, tach), tach_channel="2")
    assert r.status_code == 201, r.text
    with migrated_db.read() as s:
        row = s.get(RecordTach, r.json()["record_id"])
    assert row.source == "channel" and row.n_pulses == pulses.size
    assert "irregular" in _error(post(_wav(accel, tach, drop=True), tach_channel="2", client_ref="b"), 422,
                                 "tach_channel")
    assert "not in this file" in _error(post(_wav(accel, tach), tach_channel="3", client_ref="c"), 422,
                                        "tach_channel")
    assert _count(migrated_db, RecordTach) == 1


def test_route_zip_rows_with_a_tach_channel(live_server, plant, plant_key_headers, migrated_db):
    accel, _, tach = _record()
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("manifest.csv", "point,measured_at,file,units,tach_channel,pulses_per_rev\n"
                    "P1-DE-H,2026-03-02T08:00:00Z,good.wav,m/s2,2,1\n"
                    "P1-NDE-V,2026-03-02T08:03:00Z,bad.wav,m/s2,2,1\n"  # a pulse missing: rejected
                    "P1-NDE-V,2026-03-02T08:06:00Z,good.wav,m/s2,two,1\n")  # not a number: rejected
        zf.writestr("good.wav", _wav(accel, tach))
        zf.writestr("bad.wav", _wav(accel, tach, drop=True))
    r = httpx.post(f"{live_server}/api/v1/routes/{plant.route_id}/uploads", headers=plant_key_headers,
                   files={"file": ("walk.zip", buf.getvalue(), "application/zip")}, timeout=60)
    assert r.status_code == 201, r.text
    rows = r.json()["rows"]
    assert [(x["status"], (x.get("error") or {}).get("field")) for x in rows] == [
        ("accepted", None), ("rejected", "tach_channel"), ("rejected", "tach_channel")]
    assert "irregular" in rows[1]["error"]["message"]
    with migrated_db.read() as s:
        assert s.get(RecordTach, rows[0]["record_id"]).n_pulses > 150
    assert _count(migrated_db, RecordTach) == 1


def test_concurrent_ingests_store_each_tach_with_its_record(migrated_db, plant):
    # concurrent sends share a transaction (group commit, server/services/ingest.py): each record keeps its
    # own pulses; the different lengths tell them apart
    import threading

    from server.services.ingest import _group, ingest_record

    db = migrated_db
    db.group_commit_max = 8
    accel, pulses, _ = _record()
    start = threading.Barrier(12)
    out: dict[int, object] = {}

    def send(i: int):
        start.wait(30)
        out[i] = ingest_record(db, point_id=plant.point_id, samples=accel[: int(FS * (4 + 0.25 * i))],
                               fs_hz=FS, units="m/s2", measured_at=utcnow(), client_ref=f"t{i}",
                               tach_pulses_s=pulses[pulses < 4 + 0.25 * i - 1 / FS] if i % 2 else None)

    threads = [threading.Thread(target=send, args=(i,)) for i in range(12)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    with db.read() as s:
        for i, o in out.items():
            row = s.get(RecordTach, o.record_id)
            if i % 2:
                want = pulses[pulses < 4 + 0.25 * i - 1 / FS]
                assert np.array_equal(np.frombuffer(row.pulses, "<f8"), want)
            else:
                assert row is None
    assert len(out) == 12 and _count(db, RecordTach) == 6
    assert _group(db).batches < _group(db).items  # several records per transaction
