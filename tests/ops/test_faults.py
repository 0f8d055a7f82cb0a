"""Faults with real processes and real databases: a server killed mid-burst, a full disk, SMTP down for
an hour, clock jumps, a damaged waveform blob.

Integrity checks use hashlib's sha256 of the float32 little-endian samples as the reference checksum
and SQLite's own ``PRAGMA integrity_check`` (SQLite documentation) for the file.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import sqlite3
import threading
import time
from pathlib import Path

import httpx
import numpy as np
import pytest
from ops.helpers import wait_for
from sqlalchemy import func, select, update
from support.signals import tone_record

from server import worker
from server.services.ingest import ingest_record
from server.services.users import create_api_key
from server.storage import blobs
from server.storage.tables import Job, Record, Result, Waveform

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


def sha(x: np.ndarray) -> str:
    return hashlib.sha256(np.asarray(x, "<f4").tobytes()).hexdigest()


def stored(db, record_id: int):
    """(record, decoded samples, job) of one record, or None if it is not there."""
    with db.read() as s:
        rec = s.get(Record, record_id)
        if rec is None:
            return None
        wf = s.get(Waveform, record_id)
        jobs = s.scalars(select(Job).where(Job.record_id == record_id)).all()
    return rec, blobs.decode_waveform(wf.codec, wf.data), jobs


def post(base, key, point_id, x, ref, timeout=10.0):
    return httpx.post(f"{base}/api/v1/points/{point_id}/records", content=np.asarray(x, "<f4").tobytes(),
                      params={"fs_hz": 2560, "units": "m/s2", "measured_at": T0.isoformat(),
                              "client_ref": ref},
                      headers={"Authorization": f"Bearer {key}", "Content-Type": "application/octet-stream"},
                      timeout=timeout)


@pytest.mark.slow
def test_server_killed_during_a_burst_keeps_every_acknowledged_record(backend, procs, rng):
    db, settings, plant = backend
    key, _ = create_api_key(db, name="burst", role="technician")
    server, base = procs.server(settings)
    signals = {f"burst-{i}": tone_record(rng, n=4096, amp_half=0.01 * i) for i in range(240)}
    answers: dict[str, object] = {}
    lock = threading.Lock()
    refs = iter(list(signals))

    def sender():
        while True:
            with lock:
                ref = next(refs, None)
            if ref is None:
                return
            try:
                r = post(base, key, plant.point_id, signals[ref], ref, timeout=5.0)
                out = (r.status_code, r.json().get("record_id") if r.status_code < 300 else None)
            except httpx.HTTPError as exc:
                out = ("error", type(exc).__name__)
            with lock:
                answers[ref] = out

    threads = [threading.Thread(target=sender) for _ in range(6)]
    for t in threads:
        t.start()
    wait_for(lambda: sum(1 for a in list(answers.values()) if a[0] == 201) >= 25, timeout_s=60,
             what="25 acknowledged records")
    procs.kill(server)  # SIGKILL in the middle of the burst
    for t in threads:
        t.join(30)
    acked = {ref: rid for ref, (status, rid) in answers.items() if status == 201}
    failed = [ref for ref, (status, _) in answers.items() if status != 201]
    assert len(acked) >= 25 and failed, "the kill should land mid-burst"
    if db.is_sqlite:  # the file itself survived the kill (SQLite's own check)
        with sqlite3.connect(db.url.split("///", 1)[1]) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    for ref, rid in acked.items():  # every 2xx is there, bit-exact, with its analysis job
        rec, samples, jobs = stored(db, rid)
        assert rec.client_ref == ref and rec.checksum == sha(signals[ref]) == sha(samples)
        assert len(jobs) == 1
    with db.read() as s:  # nothing that got an error is half-stored: record, blob and job together
        rows = s.execute(select(Record.id, Record.client_ref)).all()
    for rid, ref in rows:
        rec, samples, jobs = stored(db, rid)
        assert sha(samples) == rec.checksum == sha(signals[ref]) and len(jobs) == 1
    # after a restart the senders retry what failed with the same reference: no duplicates
    _, base = procs.server(settings)
    for ref in failed[:15]:
        r = post(base, key, plant.point_id, signals[ref], ref)
        assert r.status_code in (200, 201), r.text
    with db.read() as s:
        refs_stored = s.scalars(select(Record.client_ref)).all()
    assert len(refs_stored) == len(set(refs_stored))


def _fill_disk_settings(tmp_path):
    """A small real file system for the database (tmpfs with a size limit), or None if not allowed."""
    import subprocess

    mnt = tmp_path / "small-fs"
    mnt.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=6m", "tmpfs", str(mnt)], capture_output=True)
    return mnt if done.returncode == 0 else None


@pytest.mark.slow
def test_full_disk_is_a_clear_503_then_recovers_without_corruption(tmp_path, procs, rng):
    import subprocess

    from support.fixtures import settings_for
    from support.plant import make_plant

    from server.migrations import upgrade
    from server.storage import Database

    mnt = _fill_disk_settings(tmp_path)
    if mnt is None:
        pytest.skip("mounting a small file system is not allowed here")
    try:
        settings = settings_for(tmp_path, data_dir=mnt / "data")
        upgrade(settings.database_url)
        db = Database(settings.database_url)
        plant = make_plant(db)
        key, _ = create_api_key(db, name="fill", role="technician")
        _, base = procs.server(settings)
        codes, acked, i = [], {}, 0
        while len(codes) < 400:  # random samples do not compress: the 6 MB fill up quickly
            x = rng.standard_normal(16384).astype(np.float32)
            r = post(base, key, plant.point_id, x, f"fill-{i}")
            codes.append(r.status_code)
            if r.status_code == 201:
                acked[r.json()["record_id"]] = sha(x)
            elif r.status_code == 503:
                body = r.json()
                assert body["ok"] is False and body["error"]["code"] == "unavailable"
                assert "full" in body["error"]["message"] and int(r.headers["Retry-After"]) > 0
                break
            else:
                raise AssertionError(f"unexpected {r.status_code}: {r.text}")
            i += 1
        assert codes[-1] == 503 and acked, codes[-5:]
        assert httpx.get(base + "/healthz").status_code in (200, 503)  # answers, does not hang
        # free space: the operator deletes something else on the volume (here: shrink is not possible,
        # so remount bigger), then the same record goes in
        assert subprocess.run(["mount", "-o", "remount,size=24m", str(mnt)]).returncode == 0
        x = rng.standard_normal(16384).astype(np.float32)
        r = post(base, key, plant.point_id, x, "after-recovery")
        assert r.status_code == 201, r.text
        acked[r.json()["record_id"]] = sha(x)
        for rid, digest in acked.items():
            rec, samples, jobs = stored(db, rid)
            assert rec.checksum == digest == sha(samples) and len(jobs) == 1
        db.dispose()
        procs.close()
        with sqlite3.connect(mnt / "data" / "halfwatch.db") as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            assert conn.execute("SELECT count(*) FROM records").fetchone()[0] == len(acked)
    finally:
        procs.close()
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def test_damaged_waveform_blob_marks_that_record_and_the_rest_go_on(backend, rng):
    db, settings, plant = backend
    ids = [ingest_record(db, point_id=plant.point_id, samples=tone_record(rng), fs_hz=2560.0, units="m/s2",
                         measured_at=T0 + dt.timedelta(hours=i), origin="api", uploader="t").record_id
           for i in range(4)]
    with db.unit_of_work() as s:  # flip bytes in the middle of the second record's stored samples
        wf = s.get(Waveform, ids[1])
        data = bytearray(wf.data)
        data[len(data) // 2: len(data) // 2 + 16] = bytes(16)
        s.execute(update(Waveform).where(Waveform.record_id == ids[1]).values(data=bytes(data)))
    while worker.run_once(db, settings, "w1"):
        pass
    with db.read() as s:
        jobs = {j.record_id: j for j in s.scalars(select(Job))}
        results = set(s.scalars(select(Result.record_id)))
    assert jobs[ids[1]].state == "failed" and "checksum" in jobs[ids[1]].error
    assert jobs[ids[1]].attempts == 1  # damage does not heal: no pointless retries
    assert results == {ids[0], ids[2], ids[3]}
    assert all(jobs[i].state == "done" for i in (ids[0], ids[2], ids[3]))


def test_clock_jumps_neither_lose_nor_double_jobs(backend, rng):
    db, settings, plant = backend
    out = ingest_record(db, point_id=plant.point_id, samples=tone_record(rng), fs_hz=2560.0, units="m/s2",
                        measured_at=T0, origin="api", uploader="t")
    now = dt.datetime.now(dt.UTC)
    # forward jump (e.g. an NTP step of +2 h) while a worker holds the job: the lease looks expired,
    # a second worker takes it, and the fence keeps the first worker's late result out
    first = worker.claim(db, "before-jump", lease_s=30, max_attempts=3, now=now)
    second = worker.claim(db, "after-jump", lease_s=30, max_attempts=3, now=now + dt.timedelta(hours=2))
    assert second is not None and second.job_id == first.job_id
    record, asset, samples = worker.load(db, out.record_id)
    analysis = worker.analyse(record, asset, samples)
    worker.store(db, second, record, analysis, settings)
    with pytest.raises(worker.LeaseLost):
        worker.store(db, first, record, analysis, settings)
    # backward jump: a job queued before the clock went back 2 h is still due, not parked for 2 h
    late = ingest_record(db, point_id=plant.point_id, samples=tone_record(rng), fs_hz=2560.0, units="m/s2",
                         measured_at=T0 + dt.timedelta(hours=1), origin="api", uploader="t")
    stepped_back = dt.datetime.now(dt.UTC) - dt.timedelta(hours=2)
    got = worker.claim(db, "w", lease_s=30, max_attempts=3, now=stepped_back)
    assert got is not None and got.record_id == late.record_id
    with db.read() as s:
        n = s.scalar(select(func.count()).select_from(Result).where(Result.record_id == out.record_id))
    assert n == 1


class _Inbox:
    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):
        from email import message_from_bytes, policy

        self.messages.append(message_from_bytes(envelope.content, policy=policy.default))
        return "250 OK"


@pytest.mark.slow
def test_smtp_down_for_an_hour_then_every_email_once(backend, tmp_path):
    from aiosmtpd.controller import Controller
    from alarms.helpers import Feeder, make_result
    from support.servers import free_port

    from server.alarms import service
    from server.alarms.mailer import run_mailer_once
    from server.alarms.tables import OutboxMessage

    db, settings, plant = backend
    port = free_port()
    settings = settings.model_copy(update=dict(smtp_host="127.0.0.1", smtp_port=port, smtp_timeout_s=2,
                                               smtp_from="halfwatch@example.test"))
    for i in range(3):
        service.create_subscription(db, {"email": f"planner{i}@example.test", "scope": "site",
                                         "scope_id": plant.site_id}, actor="admin1")
    feeder = Feeder(db, settings)
    for k, point in enumerate(plant.point_ids.values()):  # three points go into alarm
        for v in (0.2, 0.3, 1.5, 1.6, 1.9, 3.0, 3.2, 3.5):
            feeder.feed(point, make_result(half_v=v + 0.01 * k))
    with db.read() as s:
        queued = s.scalar(select(func.count()).select_from(OutboxMessage))
    assert queued >= 3
    start = dt.datetime.now(dt.UTC)
    for minute in range(0, 61):  # one simulated hour, the mailer polling each minute, nobody listening
        assert run_mailer_once(db, settings, now=start + dt.timedelta(minutes=minute)) == 0
    with db.read() as s:
        rows = s.scalars(select(OutboxMessage)).all()
    assert {r.status for r in rows} == {"pending"} and min(r.attempts for r in rows) >= 5
    inbox = _Inbox()
    smtp = Controller(inbox, hostname="127.0.0.1", port=port, ready_timeout=10)
    smtp.start()
    try:
        later = start + dt.timedelta(hours=3)  # past every backoff (capped at mail_backoff_max_s)
        sent = run_mailer_once(db, settings, now=later)
        sent += run_mailer_once(db, settings, now=later + dt.timedelta(hours=1))
        assert run_mailer_once(db, settings, now=later + dt.timedelta(hours=5)) == 0
    finally:
        smtp.stop()
    assert sent == queued == len(inbox.messages)
    ids = [m["Message-ID"] for m in inbox.messages]
    assert len(set(ids)) == len(ids)  # none twice
    with db.read() as s:
        assert {r.status for r in s.scalars(select(OutboxMessage))} == {"sent"}


def test_sensor_clock_ahead_is_refused_clearly():
    """A sensor whose clock jumped ahead gets a 4xx naming measured_at, not a silent future record."""
    from server.errors import AppError
    from server.services.ingest import Limits, check_time

    with pytest.raises(AppError) as err:
        check_time(dt.datetime.now(dt.UTC) + dt.timedelta(hours=3), Limits())
    assert err.value.status == 400 and err.value.field == "measured_at" and "clock" in err.value.message


def test_overload_is_shed_with_503_and_retry_after():
    """More ingest requests at once than allowed: the extra one is refused at once, nothing stored."""
    import asyncio

    from support.fixtures import settings_for

    from server.hardening import IngestAdmission

    release = asyncio.Event()
    calls = []

    async def slow_ingest(scope, receive, send):  # stands in for the route while it stores a record
        calls.append(scope["path"])
        await release.wait()
        await send({"type": "http.response.start", "status": 201, "headers": []})
        await send({"type": "http.response.body", "body": b"{}"})

    settings = settings_for(Path("."), max_inflight_ingests=2, ingest_retry_after_s=3)
    gate = IngestAdmission(slow_ingest, settings)

    async def request(path):
        sent = []

        async def send(message):
            sent.append(message)

        async def receive():
            return {"type": "http.request", "body": b"", "more_body": False}

        await gate({"type": "http", "method": "POST", "path": path, "headers": []}, receive, send)
        return sent

    async def scenario():
        first = [asyncio.create_task(request(f"/api/v1/points/{i}/records")) for i in (1, 2)]
        await asyncio.sleep(0.05)
        refused = await request("/api/v1/points/3/records")
        read = asyncio.create_task(request("/api/v1/points/3/trend"))  # not an ingest: never shed
        await asyncio.sleep(0.05)
        release.set()
        return [await t for t in first], refused, await read

    first, refused, read = asyncio.run(scenario())
    assert [m[0]["status"] for m in first] == [201, 201] and read[0]["status"] == 201
    start = refused[0]
    assert start["status"] == 503 and (b"retry-after", b"3") in start["headers"]
    body = json.loads(refused[1]["body"])
    assert body["ok"] is False and body["error"]["code"] == "overloaded" and "nothing was stored" in \
        body["error"]["message"]
    assert calls.count("/api/v1/points/3/records") == 0  # refused before the route ran


def test_a_deep_analysis_queue_pushes_back_until_the_workers_catch_up(tmp_path, rng):
    from fastapi.testclient import TestClient
    from support.fixtures import settings_for
    from support.plant import make_plant

    from server.app import create_app
    from server.migrations import upgrade
    from server.storage import Database

    settings = settings_for(tmp_path, max_queued_jobs=3)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    plant = make_plant(db)
    key, _ = create_api_key(db, name="q", role="technician")
    headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/octet-stream"}
    params = {"fs_hz": 2560, "units": "m/s2", "measured_at": T0.isoformat()}

    def send(i):
        return client.post(f"/api/v1/points/{plant.point_id}/records",
                           params={**params, "client_ref": f"q{i}"}, content=tone_record(rng).tobytes(),
                           headers=headers)

    with TestClient(create_app(settings)) as client:
        assert [send(i).status_code for i in range(3)] == [201, 201, 201]
        time.sleep(1.1)  # the queue is counted at most once a second
        r = send(3)
        assert r.status_code == 503 and r.headers["Retry-After"] and "queue" in r.json()["error"]["message"]
        assert worker.run_once(db, settings, "w1")  # a worker catches up by one job
        time.sleep(1.1)
        assert send(3).status_code == 201
    with db.read() as s:
        assert s.scalar(select(func.count()).select_from(Record)) == 4  # the refused try left nothing
    db.dispose()
