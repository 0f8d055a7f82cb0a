"""The analysis worker: claim a job with a lease -> analyse outside any transaction -> store + alarms.

Claiming is one atomic ``UPDATE ... WHERE id = (SELECT ... LIMIT 1) RETURNING`` (on PostgreSQL the
subquery takes ``FOR UPDATE SKIP LOCKED``, so workers on several machines share the queue). A job whose
lease ran out (its worker crashed or was killed) is claimed again; each claim counts as an attempt and
after ``max_attempts`` the job is marked failed with its error. Storing the result checks that the job
is still leased to this worker at this attempt (a fencing token), so no job is ever stored twice.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import os
import socket
import threading
import time
import uuid
from dataclasses import dataclass

from sqlalchemy import and_, or_, select, update

from server.storage import blobs
from server.storage.packing import pack_arrays
from server.storage.tables import Asset, Job, Point, Record, Result, Waveform, utcnow

log = logging.getLogger("halfwatch.worker")

SPECTRUM_POINTS = 2048
ENVELOPE_POINTS = 1000


class LeaseLost(RuntimeError):
    """The job's lease expired and someone else owns it now; this worker's result is discarded."""


@dataclass(frozen=True)
class Claim:
    job_id: int
    record_id: int
    attempt: int
    worker_id: str


def default_worker_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


def claim(db, worker_id: str, *, lease_s: float, max_attempts: int, now: dt.datetime | None = None):
    """Claim the oldest runnable job (queued, or running with an expired lease); None if there is none."""
    now = now or utcnow()
    with db.unit_of_work() as s:
        s.execute(  # leases that ran out on the last allowed attempt: give up on them
            update(Job).where(Job.state == "running", Job.lease_until < now, Job.attempts >= max_attempts)
            .values(state="failed", finished_at=now, lease_until=None,
                    error=f"lease expired on attempt {max_attempts} of {max_attempts}: the worker "
                    "stopped during the analysis (crashed or killed)")
        )
        runnable = or_(and_(Job.state == "queued", Job.not_before <= now),
                       and_(Job.state == "running", Job.lease_until < now))
        pick = select(Job.id).where(runnable).order_by(Job.id).limit(1)
        if db.dialect == "postgresql":
            pick = pick.with_for_update(skip_locked=True)
        row = s.execute(
            update(Job).where(Job.id == pick.scalar_subquery(), runnable)
            .values(state="running", attempts=Job.attempts + 1, worker_id=worker_id,
                    lease_until=now + dt.timedelta(seconds=lease_s))
            .returning(Job.id, Job.record_id, Job.attempts)
        ).first()
    return None if row is None else Claim(row[0], row[1], row[2], worker_id)


def forcing_args(record: Record, asset: Asset) -> dict:
    """The asset says what the forcing is (shaft speed x multiplier); a measured speed is exact."""
    mult = asset.forcing_multiplier or 1.0
    if record.speed_hz:
        return {"forcing_hz": record.speed_hz * mult}
    return {"nominal_hz": asset.nominal_speed_hz * mult}


def load(db, record_id: int):
    with db.read() as s:
        record = s.get(Record, record_id)
        wf = s.get(Waveform, record_id)
        asset = s.scalar(select(Asset).join(Point, Point.asset_id == Asset.id)
                         .where(Point.id == record.point_id))
    return record, asset, blobs.decode_waveform(wf.codec, wf.data)


def analyse(record: Record, asset: Asset, samples):
    from analysis import analyze_record

    return analyze_record(samples, record.fs_hz, units=record.units, machine_group=asset.machine_group,
                          foundation=asset.foundation, **forcing_args(record, asset))


def result_row(record: Record, analysis) -> Result:
    data = analysis.to_dict()
    f, a = analysis.chart_spectrum(SPECTRUM_POINTS)
    et, ev = analysis.envelope_chart(ENVELOPE_POINTS)
    sub, growth = data.get("subharmonic", {}), data.get("growth", {})
    overall, forcing = data.get("overall", {}), data.get("forcing", {})
    return Result(
        record_id=record.id, point_id=record.point_id, measured_ts=record.measured_at.timestamp(),
        analysis_version=str(data.get("version", "")), current=True, data=json.dumps(data),
        spectrum=pack_arrays({"units": record.units, "amplitude": "peak"}, freqs_hz=f, amplitude=a,
                             envelope_t_s=et, envelope=ev),
        forcing_hz=forcing.get("frequency_hz"), sub_detected=bool(sub.get("detected")),
        sub_class=sub.get("class"), sub_frequency_hz=sub.get("frequency_hz"),
        sub_amplitude=sub.get("amplitude"),
        sub_velocity_mm_s=sub.get("velocity_mm_s"), sub_snr_db=sub.get("snr_db"),
        growth_rate_per_s=growth.get("rate_per_s"),
        overall_velocity_rms_mm_s=overall.get("velocity_rms_mm_s"),
        zone=overall.get("zone"), quality_ok=bool((data.get("quality") or {}).get("ok", True)),
    )


def _fence(s, c: Claim, **values) -> None:
    done = s.execute(
        update(Job).where(Job.id == c.job_id, Job.worker_id == c.worker_id, Job.attempts == c.attempt,
                          Job.state == "running").values(**values)
    )
    if done.rowcount != 1:
        raise LeaseLost(f"job {c.job_id} attempt {c.attempt} is no longer leased to {c.worker_id}")


def store(db, c: Claim, record: Record, analysis, settings=None) -> int:
    """Store the result, mark the job done and run the alarm rules, all in one transaction."""
    from server.alarms import evaluate_result

    with db.unit_of_work() as s:
        _fence(s, c, state="done", finished_at=utcnow(), lease_until=None, error=None)
        s.execute(update(Result).where(Result.record_id == record.id, Result.current.is_(True))
                  .values(current=False))
        row = result_row(record, analysis)
        s.add(row)
        s.flush()
        evaluate_result(s, s.get(Record, record.id), row, settings=settings)
        return row.id


def fail(db, c: Claim, error: str, *, permanent: bool, settings) -> None:
    now = utcnow()
    final = permanent or c.attempt >= settings.max_attempts
    values = {"error": error[:4000], "lease_until": None}
    if final:
        values.update(state="failed", finished_at=now)
    else:
        wait = dt.timedelta(seconds=settings.retry_backoff_s * c.attempt)
        values.update(state="queued", not_before=now + wait)
    try:
        with db.unit_of_work() as s:
            _fence(s, c, **values)
    except LeaseLost:
        log.warning("job %s: lease lost before the failure could be recorded", c.job_id)


def run_once(db, settings, worker_id: str | None = None) -> bool:
    """Process one job if there is one; True if a job was claimed."""
    from analysis.errors import SignalError

    c = claim(db, worker_id or default_worker_id(), lease_s=settings.lease_s,
              max_attempts=settings.max_attempts)
    if c is None:
        return False
    try:
        record, asset, samples = load(db, c.record_id)
        analysis = analyse(record, asset, samples)
    except SignalError as exc:  # the same record fails the same way every time: no retry
        fail(db, c, f"{getattr(exc, 'field', 'samples')}: {exc}", permanent=True, settings=settings)
        return True
    except Exception as exc:
        log.exception("job %s attempt %s failed", c.job_id, c.attempt)
        fail(db, c, f"{type(exc).__name__}: {exc}", permanent=False, settings=settings)
        return True
    try:
        store(db, c, record, analysis, settings)
    except LeaseLost as exc:
        log.warning("%s; result discarded", exc)
    except Exception as exc:
        log.exception("job %s: storing the result failed", c.job_id)
        fail(db, c, f"storing the result failed: {type(exc).__name__}: {exc}", permanent=False,
             settings=settings)
    return True


def run_forever(db, settings, *, stop: threading.Event | None = None, max_jobs: int | None = None,
                worker_id: str | None = None) -> int:
    """Work until ``stop`` is set (or ``max_jobs`` jobs are done); returns the number of jobs handled."""
    from sqlalchemy.exc import OperationalError

    stop = stop or threading.Event()
    worker_id = worker_id or default_worker_id()
    handled = 0
    log.info("worker %s started", worker_id)
    while not stop.is_set() and (max_jobs is None or handled < max_jobs):
        try:
            if run_once(db, settings, worker_id):
                handled += 1
                continue
        except OperationalError as exc:  # database busy or unreachable: wait, then try again
            log.warning("worker %s: database unavailable (%s)", worker_id, exc.orig)
            time.sleep(min(5.0, settings.worker_poll_s * 10))
        stop.wait(settings.worker_poll_s)
    return handled
