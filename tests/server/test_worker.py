"""Worker: claim with a lease, analyse, store with alarms, retries, fencing, re-analysis.

Runs on a real SQLite file, and on PostgreSQL when HALFWATCH_TEST_POSTGRES_URL is set.
"""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import func, select, update
from support.fixtures import settings_for
from support.plant import make_plant
from support.signals import tone_record

from server import worker
from server.migrations import upgrade
from server.services.ingest import ingest_record
from server.services.jobs import requeue_since
from server.storage import Database
from server.storage.tables import Job, Result, Waveform

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


@pytest.fixture(params=["sqlite", "postgresql"])
def env(request, tmp_path):
    if request.param == "postgresql":
        settings = request.getfixturevalue("pg_settings").model_copy(update={"retry_backoff_s": 0.0})
    else:
        settings = settings_for(tmp_path, retry_backoff_s=0.0)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    yield db, settings, make_plant(db)
    db.dispose()


def ingest(db, point_id, x, **kw):
    args = dict(fs_hz=2560.0, units="m/s2", measured_at=T0, origin="api", uploader="test")
    args.update(kw)
    return ingest_record(db, point_id=point_id, samples=x, **args)


def test_job_is_analysed_stored_and_done(env, rng):
    db, settings, plant = env
    # 0.5X of the pump's nominal 24.75 Hz; the tone is ours (numpy), so its frequency is known exactly
    out = ingest(db, plant.point_id, tone_record(rng, amp_half=0.3))
    assert worker.run_once(db, settings, "w1") is True
    assert worker.run_once(db, settings, "w1") is False  # queue empty
    with db.read() as s:
        job = s.get(Job, out.job_id)
        res = s.scalar(select(Result).where(Result.record_id == out.record_id))
    assert job.state == "done" and job.attempts == 1 and job.error is None
    data = json.loads(res.data)
    assert res.current and res.sub_detected and data["subharmonic"]["detected"]
    assert res.sub_frequency_hz == pytest.approx(24.75 / 2, rel=2e-3)
    assert res.measured_ts == T0.timestamp()
    assert data["forcing"]["source"] in ("refined", "nominal")  # no speed given: nominal is refined


def test_measured_speed_times_multiplier_is_the_forcing(env, rng):
    db, settings, plant = env
    # reciprocating compressor: forcing = 2 strokes per revolution x 12.5 rev/s = 25 Hz
    out = ingest(db, plant.point_ids["C2-CYL-A"], tone_record(rng, forcing_hz=25.0), speed_hz=12.5)
    worker.run_once(db, settings, "w1")
    with db.read() as s:
        res = s.scalar(select(Result).where(Result.record_id == out.record_id))
    assert res.forcing_hz == pytest.approx(25.0)
    assert json.loads(res.data)["forcing"]["source"] == "given"


def test_expired_lease_is_reclaimed_and_the_late_worker_is_fenced_off(env, rng):
    db, settings, plant = env
    out = ingest(db, plant.point_id, tone_record(rng))
    first = worker.claim(db, "slow", lease_s=settings.lease_s, max_attempts=3)
    assert first.attempt == 1
    assert worker.claim(db, "other", lease_s=settings.lease_s, max_attempts=3) is None  # leased
    later = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=settings.lease_s + 1)
    second = worker.claim(db, "fast", lease_s=settings.lease_s, max_attempts=3, now=later)
    assert second.job_id == first.job_id and second.attempt == 2
    record, asset, samples = worker.load(db, out.record_id)
    analysis = worker.analyse(record, asset, samples)
    worker.store(db, second, record, analysis, settings)
    with pytest.raises(worker.LeaseLost):
        worker.store(db, first, record, analysis, settings)
    with db.read() as s:
        assert s.scalar(select(func.count()).select_from(Result)) == 1
        assert s.get(Job, out.job_id).state == "done"


def test_three_failures_mark_the_job_failed_with_its_error(env, rng, tmp_path):
    db, settings, plant = env
    out = ingest(db, plant.point_id, tone_record(rng))
    with db.unit_of_work() as s:  # a damaged blob makes every attempt fail
        s.execute(update(Waveform).where(Waveform.record_id == out.record_id).values(codec="broken"))
    for _ in range(3):
        assert worker.run_once(db, settings, "w1")
    assert worker.run_once(db, settings, "w1") is False
    with db.read() as s:
        job = s.get(Job, out.job_id)
    assert job.state == "failed" and job.attempts == 3
    assert "unknown waveform codec" in job.error


def test_lease_expiring_on_the_last_attempt_fails_the_job(env, rng):
    db, settings, plant = env
    out = ingest(db, plant.point_id, tone_record(rng))
    now = dt.datetime.now(dt.UTC)
    for k in range(3):
        assert worker.claim(db, f"w{k}", lease_s=1, max_attempts=3, now=now + dt.timedelta(seconds=2 * k))
    assert worker.claim(db, "w9", lease_s=1, max_attempts=3, now=now + dt.timedelta(seconds=10)) is None
    with db.read() as s:
        job = s.get(Job, out.job_id)
    assert job.state == "failed" and "lease expired" in job.error


def test_reanalysis_keeps_history_and_one_current_result(env, rng):
    db, settings, plant = env
    out = ingest(db, plant.point_id, tone_record(rng))
    worker.run_once(db, settings, "w1")
    assert requeue_since(db, T0 - dt.timedelta(days=1)) == 1
    assert requeue_since(db, T0 - dt.timedelta(days=1)) == 0  # already queued
    worker.run_once(db, settings, "w1")
    with db.read() as s:
        rows = s.scalars(select(Result).where(Result.record_id == out.record_id).order_by(Result.id)).all()
    assert [r.current for r in rows] == [False, True]


@pytest.mark.parametrize("batch", [1, 4])
def test_concurrent_claims_take_each_job_exactly_once(env, rng, batch):
    import threading

    db, settings, plant = env
    x = tone_record(rng, n=1024)
    ids = {ingest(db, plant.point_id, x, measured_at=T0 + dt.timedelta(minutes=i)).job_id for i in range(30)}
    claimed, lock = [], threading.Lock()

    def grab(name):
        while got := worker.claim_batch(db, name, lease_s=60, max_attempts=3, n=batch):
            with lock:
                claimed.extend(c.job_id for c in got)

    threads = [threading.Thread(target=grab, args=(f"w{i}",)) for i in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(claimed) == sorted(ids)  # every job once, none twice


def test_batch_claim_and_the_worker_loop(env, rng):
    db, settings, plant = env
    x = tone_record(rng, n=8192)  # 3.2 s: long enough for the analysis core's resolution check
    ids = [ingest(db, plant.point_id, x, measured_at=T0 + dt.timedelta(minutes=i)).job_id for i in range(3)]
    got = worker.claim_batch(db, "b", lease_s=60, max_attempts=3, n=5)
    assert [c.job_id for c in got] == ids and all(c.attempt == 1 for c in got)
    later = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=61)
    for c in worker.claim_batch(db, "b2", lease_s=60, max_attempts=3, n=5, now=later):  # leases ran out
        worker.process(db, settings, c)
    with db.read() as s:
        assert [(s.get(Job, i).state, s.get(Job, i).error) for i in ids] == [("done", None)] * 3
    more = [ingest(db, plant.point_id, x, measured_at=T0 + dt.timedelta(hours=1, minutes=i)).job_id
            for i in range(5)]
    assert worker.run_forever(db, settings.model_copy(update={"worker_batch": 2}), max_jobs=5) == 5
    with db.read() as s:
        assert [s.get(Job, i).state for i in more] == ["done"] * 5
