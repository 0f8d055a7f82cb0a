"""Several ``halfwatch worker`` processes on one queue (SQLite and PostgreSQL).

Every job is done exactly once, the stored results equal what one in-process analysis gives, and a
worker killed with SIGKILL in the middle of a job loses nothing: its lease runs out and another worker
finishes the job. Real processes, real databases; no mocks.
"""

from __future__ import annotations

import datetime as dt
import json

import pytest
from ops.helpers import wait_for
from sqlalchemy import func, select, update
from support.signals import tone_record

from server import worker
from server.services.ingest import ingest_record
from server.storage.tables import Job, Result

T0 = dt.datetime(2026, 3, 2, 8, 0, tzinfo=dt.UTC)


def ingest_many(db, plant, rng, n: int, *, n_samples: int = 16384, start_in_s: float = 0.0) -> list[int]:
    """n records spread over the plant's points; their jobs wait ``start_in_s`` before they are due."""
    ids = []
    points = list(plant.point_ids.values())
    for i in range(n):
        x = tone_record(rng, n=n_samples, amp_half=0.05 * (i % 4))
        out = ingest_record(db, point_id=points[i % len(points)], samples=x, fs_hz=2560.0, units="m/s2",
                            measured_at=T0 + dt.timedelta(minutes=i), origin="api", uploader="test")
        ids.append(out.record_id)
    if start_in_s:
        due = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=start_in_s)
        with db.unit_of_work() as s:
            s.execute(update(Job).values(not_before=due))
    return ids


def job_states(db) -> dict[str, int]:
    with db.read() as s:
        return dict(s.execute(select(Job.state, func.count()).group_by(Job.state)).all())


def all_done(db, n: int) -> bool:
    return job_states(db).get("done", 0) == n


def job_report(db, procs) -> str:
    with db.read() as s:
        jobs = [(j.id, j.state, j.attempts, j.worker_id, j.error) for j in s.scalars(select(Job))]
    return f"jobs: {jobs}\n" + "\n".join(procs.output(p)[-3000:] for p in procs.started)


def expected_data(db, record_id: int) -> dict:
    """What a single in-process analysis of the stored record gives."""
    record, asset, samples = worker.load(db, record_id)
    return json.loads(worker.result_row(record, worker.analyse(record, asset, samples)).data)


@pytest.mark.slow
def test_two_workers_do_every_job_once_with_single_worker_results(backend, procs, rng):
    db, settings, plant = backend
    n = 24
    ids = ingest_many(db, plant, rng, n, start_in_s=4.0)  # both workers are up before the jobs are due
    workers = [procs.worker(settings), procs.worker(settings)]
    wait_for(lambda: all_done(db, n), timeout_s=90, what=f"{n} jobs done",
             detail=lambda: job_report(db, procs))
    for p in workers:
        assert p.poll() is None, procs.output(p)  # still running: no crash
    with db.read() as s:
        jobs = s.scalars(select(Job).order_by(Job.record_id)).all()
        results = s.scalars(select(Result).order_by(Result.record_id)).all()
    assert [j.record_id for j in jobs] == ids
    assert [(j.state, j.attempts, j.error) for j in jobs] == [("done", 1, None)] * n, job_report(db, procs)
    assert [r.record_id for r in results] == ids  # exactly one result per record
    assert all(r.current for r in results)
    assert len({j.worker_id for j in jobs}) == 2, "both workers should have taken jobs"
    for r in results[::5]:  # identical to one worker's analysis, every key and value
        assert json.loads(r.data) == expected_data(db, r.record_id)


@pytest.mark.slow
def test_worker_killed_mid_job_loses_nothing(backend, procs, rng):
    db, settings, plant = backend
    settings = settings.model_copy(update={"lease_s": 2.0})
    # a long record first: its analysis takes a good fraction of a second, so the kill lands mid-job
    long_id = ingest_many(db, plant, rng, 1, n_samples=2_000_000)[0]
    rest = ingest_many(db, plant, rng, 5)
    victim = procs.worker(settings)

    def victim_is_running_the_long_job():
        with db.read() as s:
            job = s.scalar(select(Job).where(Job.record_id == long_id))
        return job.state == "running" and job.worker_id is not None

    wait_for(victim_is_running_the_long_job, timeout_s=60, every_s=0.01, what="the long job to be claimed")
    procs.kill(victim)  # SIGKILL: no cleanup, no chance to write anything
    assert victim.returncode == -9
    with db.read() as s:
        job = s.scalar(select(Job).where(Job.record_id == long_id))
        assert job.state == "running" and job.attempts == 1  # left behind, leased to a dead worker
        assert s.scalar(select(func.count()).select_from(Result).where(Result.record_id == long_id)) == 0
    procs.worker(settings)
    wait_for(lambda: all_done(db, 1 + len(rest)), timeout_s=90, what="every job done after the kill",
             detail=lambda: job_report(db, procs))
    with db.read() as s:
        job = s.scalar(select(Job).where(Job.record_id == long_id))
        per_record = dict(s.execute(select(Result.record_id, func.count()).group_by(Result.record_id)).all())
    assert job.attempts == 2 and job.error is None  # reclaimed once the 2 s lease ran out
    assert per_record == {i: 1 for i in [long_id, *rest]}
