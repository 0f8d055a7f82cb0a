"""Worker batches (one read per claimed batch, one write transaction for its results) and the waveform
codecs, the current one and the ones earlier versions wrote."""

from __future__ import annotations

import datetime as dt
import zlib

import numpy as np
import pytest
from sqlalchemy import func, select, update
from support.signals import tone_record

from server import worker
from server.services.ingest import ingest_record
from server.storage import blobs
from server.storage.tables import Job, Result, Waveform

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


@pytest.fixture
def env(hw_settings, migrated_db, plant):
    """The shared fixtures (SQLite, and PostgreSQL too when HALFWATCH_TEST_POSTGRES_URL is set)."""
    return migrated_db, hw_settings.model_copy(update={"retry_backoff_s": 0.0}), plant


def queue(db, plant, rng, n: int) -> list:
    x = tone_record(rng, n=8192, amp_half=0.2)  # 3.2 s at 2560 Hz: enough for the resolution check
    return [ingest_record(db, point_id=plant.point_id, samples=x, fs_hz=2560.0, units="m/s2",
                          measured_at=T0 + dt.timedelta(minutes=i), origin="api", uploader="test")
            for i in range(n)]


def analysed(db, claims) -> list[worker.Analysed]:
    loaded = worker.load_many(db, [c.record_id for c in claims])
    return [worker.Analysed(c, loaded[c.record_id][0], worker.analyse(*loaded[c.record_id]),
                            loaded[c.record_id][2]) for c in claims]


def test_a_lost_lease_in_a_batch_leaves_the_other_results_stored(env, rng):
    db, settings, plant = env
    outs = queue(db, plant, rng, 3)
    claims = worker.claim_batch(db, "slow", lease_s=1, max_attempts=3, n=3)
    assert [c.job_id for c in claims] == [o.job_id for o in outs]
    items = analysed(db, claims)
    # the middle job's lease runs out and another worker takes it: the slow worker is fenced off for it
    with db.write() as conn:
        conn.execute(update(Job.__table__).where(Job.__table__.c.id != claims[1].job_id)
                     .values(lease_until=dt.datetime.now(dt.UTC) + dt.timedelta(minutes=5)))
    later = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=5)
    stolen = worker.claim_batch(db, "fast", lease_s=60, max_attempts=3, n=3, now=later)
    assert [c.job_id for c in stolen] == [claims[1].job_id]
    got = worker.store_batch(db, items, settings)
    assert isinstance(got[1], worker.LeaseLost)
    assert isinstance(got[0], int) and isinstance(got[2], int)
    with db.read() as s:
        stored = set(s.scalars(select(Result.record_id)))
        states = [s.get(Job, o.job_id).state for o in outs]
    assert stored == {outs[0].record_id, outs[2].record_id}
    assert states == ["done", "running", "done"]


def test_a_failing_alarm_evaluation_rolls_back_only_its_own_job(env, rng, monkeypatch):
    import server.alarms

    db, settings, plant = env
    outs = queue(db, plant, rng, 3)
    real = server.alarms.evaluate_result
    bad_record = outs[0].record_id

    def evaluate(session, record, result, **kw):
        if record.id == bad_record:
            raise RuntimeError("rule engine broke")
        return real(session, record, result, **kw)

    monkeypatch.setattr(server.alarms, "evaluate_result", evaluate)
    claims = worker.claim_batch(db, "w", lease_s=60, max_attempts=3, n=3)
    worker.process_batch(db, settings, claims)
    with db.read() as s:
        stored = set(s.scalars(select(Result.record_id)))
        jobs = [s.get(Job, o.job_id) for o in outs]
        codecs = [s.get(Waveform, o.record_id).codec for o in outs]
    assert stored == {outs[1].record_id, outs[2].record_id}  # result and job stay together
    assert [j.state for j in jobs] == ["queued", "done", "done"]
    assert "storing the result failed: RuntimeError: rule engine broke" in jobs[0].error
    assert codecs == [blobs.RAW_CODEC, blobs.CODEC, blobs.CODEC]  # the rolled-back job kept its raw samples
    monkeypatch.setattr(server.alarms, "evaluate_result", real)
    assert worker.run_forever(db, settings, max_jobs=1) == 1  # the retry succeeds
    with db.read() as s:
        assert s.get(Job, outs[0].job_id).state == "done"
        assert s.scalar(select(func.count()).select_from(Result)) == 3


def test_one_damaged_record_in_a_batch_fails_alone(env, rng):
    db, settings, plant = env
    outs = queue(db, plant, rng, 3)
    with db.write() as conn:  # flip one stored byte: the ingest checksum (sha256) no longer matches
        wf = conn.execute(select(Waveform.data).where(Waveform.record_id == outs[1].record_id)).scalar_one()
        damaged = bytes(wf[:100]) + bytes([wf[100] ^ 1]) + bytes(wf[101:])
        conn.execute(update(Waveform.__table__).where(Waveform.__table__.c.record_id == outs[1].record_id)
                     .values(data=damaged))
    loaded = worker.load_many(db, [o.record_id for o in outs])
    assert isinstance(loaded[outs[1].record_id], worker.DamagedWaveform)
    assert worker.run_forever(db, settings.model_copy(update={"worker_batch": 3}), max_jobs=3) == 3
    with db.read() as s:
        jobs = [s.get(Job, o.job_id) for o in outs]
    assert [j.state for j in jobs] == ["done", "failed", "done"]
    assert jobs[1].attempts == 1 and "checksum" in jobs[1].error  # no retry for damage


def test_alarms_off_stores_results_without_alarm_events(env, rng):
    from server.alarms.tables import AlarmEvent

    db, settings, plant = env
    outs = queue(db, plant, rng, 2)
    assert worker.run_forever(db, settings, max_jobs=2, alarms=False) == 2
    with db.read() as s:
        assert s.scalar(select(func.count()).select_from(Result)) == 2
        assert s.scalar(select(func.count()).select_from(AlarmEvent)) == 0
        assert [s.get(Job, o.job_id).state for o in outs] == ["done", "done"]


def _specials(rng) -> np.ndarray:
    # IEEE 754 single-precision edge values (zeros of both signs, subnormals, near the largest finite)
    specials = np.array([0.0, -0.0, 1e-45, -1e-45, 3.4e38, -3.4e38, 1.0, np.pi], dtype="<f4")
    return np.concatenate([specials, rng.standard_normal(4099).astype("<f4")])


def test_blobs_written_by_earlier_versions_still_read_bit_exactly(rng):
    x = _specials(rng)
    planes = x.view(np.uint8).reshape(-1, 4).T  # byte plane k = byte k of every little-endian float32
    two_raw = x.size.to_bytes(4, "little") + planes[:2].tobytes() + zlib.compress(planes[2:].tobytes(), 1)
    all_zlib = zlib.compress(planes.tobytes(), 1)
    for codec, data in (("f4le-shuffle-hi-zlib1", two_raw), ("f4le-shuffle-zlib1", all_zlib),
                        blobs.encode_waveform(x), blobs.encode_raw(x)):
        assert np.array_equal(blobs.decode_waveform(codec, data).view(np.uint32), x.view(np.uint32)), codec
    codec, data = blobs.encode_waveform(x)
    head = 4 + 3 * x.size  # the count and the three raw planes
    with pytest.raises(ValueError, match="damaged"):  # a whole zlib stream of the wrong length
        blobs.decode_waveform(codec, data[:head] + zlib.compress(b"short"))
    with pytest.raises(zlib.error):  # a cut stream (the worker reports it as a damaged waveform)
        blobs.decode_waveform(codec, data[:-8])


def test_raw_blobs_decode_without_a_copy(rng):
    x = _specials(rng)
    data = blobs.encode_raw(x)[1]
    y = blobs.decode_waveform(blobs.RAW_CODEC, data)
    assert np.shares_memory(y, np.frombuffer(data, dtype=np.uint8)) and not y.flags.writeable
    # hashlib's sha256 of the same bytes, however the array is held
    import hashlib

    expected = hashlib.sha256(x.tobytes()).hexdigest()
    assert blobs.checksum(y) == expected == blobs.checksum(x.astype(np.float64))
