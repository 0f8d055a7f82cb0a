"""End to end over loopback: the real `halfwatch serve --with-worker` process, a sensor posting with an
API key, results within seconds; and a worker process killed with SIGKILL loses nothing."""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import numpy as np
import pytest
from sqlalchemy import func, select
from support.fixtures import migrate, settings_for
from support.plant import make_plant
from support.servers import free_port, serve_in_thread
from support.signals import tone_record

from server.services.ingest import ingest_record
from server.services.users import create_api_key
from server.storage import Database
from server.storage.tables import Job, Result

REPO = Path(__file__).resolve().parents[2]


def env_for(settings, **extra) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env.update(HALFWATCH_DATABASE_URL=settings.database_url, HALFWATCH_DATA_DIR=str(settings.data_dir),
               HALFWATCH_ARGON2_TIME_COST="1", HALFWATCH_ARGON2_MEMORY_COST_KIB="1024",
               HALFWATCH_ARGON2_PARALLELISM="1", HALFWATCH_WORKER_POLL_S="0.05", **extra)
    return env


def wait_for(pred, timeout_s: float, what: str):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout_s:
        value = pred()
        if value:
            return value
        time.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what}")


@pytest.fixture
def seeded(tmp_path, migrated_template):
    settings = settings_for(tmp_path)
    migrate(settings, migrated_template)
    db = Database(settings.database_url)
    plant = make_plant(db)
    key, _ = create_api_key(db, name="sensor", site=plant.site_id)
    yield settings, db, plant, key
    db.dispose()


@pytest.mark.slow
def test_sensor_posts_and_sees_the_result_within_seconds(seeded, rng):
    settings, db, plant, key = seeded
    port = free_port()
    proc = subprocess.Popen([sys.executable, "-m", "server", "serve", "--with-worker", "--port", str(port)],
                            cwd=REPO, env=env_for(settings), stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"
    try:
        def up():
            try:
                return httpx.get(base + "/healthz", timeout=0.5).status_code == 200
            except httpx.TransportError:
                assert proc.poll() is None, proc.stdout.read().decode()
                return False

        wait_for(up, 30, "the server")
        x = tone_record(rng, amp_half=0.3)
        h = {"Authorization": f"Bearer {key}", "Content-Type": "application/octet-stream"}
        params = {"fs_hz": 2560, "units": "m/s2", "measured_at": "2026-03-02T08:00:00Z", "client_ref": "s-1"}
        t0 = time.monotonic()
        r = httpx.post(f"{base}/api/v1/points/{plant.point_id}/records", params=params, content=x.tobytes(),
                       headers=h)
        assert r.status_code == 201, r.text
        rid = r.json()["record_id"]
        # durable before the answer: a separate connection sees the record and its job at once
        with db.read() as s:
            assert s.scalar(select(func.count()).select_from(Job).where(Job.record_id == rid)) == 1

        def analysed():
            body = httpx.get(f"{base}/api/v1/records/{rid}", headers={"X-API-Key": key}).json()
            return body if body["result"] else None

        body = wait_for(analysed, 10, "the analysis")
        assert time.monotonic() - t0 < 10
        assert body["job"]["state"] == "done" and body["result"]["subharmonic"]["detected"]
        again = httpx.post(f"{base}/api/v1/points/{plant.point_id}/records", params=params,
                           content=x.tobytes(), headers=h)
        assert again.status_code == 200 and again.json()["record_id"] == rid
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.mark.slow
def test_killed_worker_loses_nothing(seeded, rng):
    settings, db, plant, _ = seeded
    # a long record (2**22 samples) so the worker is surely inside the analysis when it is killed
    x = tone_record(rng, fs_hz=25600.0, n=2**22)
    out = ingest_record(db, point_id=plant.point_id, samples=x, fs_hz=25600.0, units="m/s2",
                        measured_at=dt.datetime(2026, 3, 2, tzinfo=dt.UTC), origin="api", uploader="t")
    env = env_for(settings, HALFWATCH_LEASE_S="2")
    victim = subprocess.Popen([sys.executable, "-m", "server", "worker"], cwd=REPO, env=env)

    def state():
        with db.read() as s:
            return s.get(Job, out.job_id).state

    try:
        wait_for(lambda: state() == "running", 30, "the worker to claim the job")
    finally:
        os.kill(victim.pid, signal.SIGKILL)
        victim.wait(10)
    assert victim.returncode == -signal.SIGKILL
    with db.read() as s:
        job = s.get(Job, out.job_id)
        assert job.state == "running" and job.attempts == 1
        assert s.scalar(select(func.count()).select_from(Result)) == 0
    # a fresh worker takes the job over once the lease has run out, and finishes it
    rescue = subprocess.run([sys.executable, "-m", "server", "worker", "--max-jobs", "1"], cwd=REPO, env=env,
                            timeout=60, capture_output=True)
    assert rescue.returncode == 0, rescue.stderr.decode()
    with db.read() as s:
        job = s.get(Job, out.job_id)
        results = s.scalars(select(Result).where(Result.record_id == out.record_id)).all()
    assert job.state == "done" and job.attempts == 2 and len(results) == 1
    assert job.worker_id != "" and results[0].current


def test_threaded_live_server_serves_the_api(app, plant, api_key, rng):
    with serve_in_thread(app) as base:
        r = httpx.post(f"{base}/api/v1/points/{plant.point_id}/records",
                       json={"fs_hz": 2560, "units": "g", "measured_at": "2026-03-02T08:00:00Z",
                             "samples": np.round(tone_record(rng, n=512), 6).tolist()},
                       headers={"X-API-Key": api_key})
        assert r.status_code == 201
        assert httpx.get(f"{base}/healthz").json()["ok"] is True
