"""The worker's loop: claim a batch -> load and analyse outside any transaction -> store + alarms.

``run_once`` processes one job, ``run_forever`` is the service loop (with the alert-email and retention
threads beside it). Claims and failures go through server/worker/claim.py, reads and the analysis through
server/worker/load.py, and every result through server/worker/store.py: this module writes nothing itself.
"""

from __future__ import annotations

import logging
import threading
import time

from server.worker.claim import Claim, LeaseLost, claim, claim_batch, default_worker_id, fail, start_heartbeat
from server.worker.load import DamagedWaveform, analyse, load_many
from server.worker.store import Analysed, store_batch

log = logging.getLogger("halfwatch.worker")


def run_once(db, settings, worker_id: str | None = None, heartbeat=None) -> bool:
    """Process one job if there is one; True if a job was claimed.

    ``heartbeat`` (server.ops.heartbeat.Heartbeat) collects the analysis durations for /metrics."""
    c = claim(db, worker_id or default_worker_id(), lease_s=settings.lease_s,
              max_attempts=settings.max_attempts)
    if c is None:
        return False
    process(db, settings, c, heartbeat)
    return True


def process(db, settings, c: Claim, heartbeat=None, *, alarms: bool = True) -> None:
    """Analyse one claimed job and store the result (or record the failure)."""
    process_batch(db, settings, [c], heartbeat, alarms=alarms)


def _analyse_claims(db, settings, claims: list[Claim], heartbeat) -> list[Analysed]:
    """Load the batch in one read and analyse each record; failures are recorded on their jobs."""
    from analysis.errors import SignalError

    try:
        loaded = load_many(db, [c.record_id for c in claims])
    except Exception as exc:  # the read itself failed: every job is retried later
        log.exception("loading %d records failed", len(claims))
        for c in claims:
            fail(db, c, f"{type(exc).__name__}: {exc}", permanent=False, settings=settings)
        return []
    ready = []
    for c in claims:
        got = loaded.get(c.record_id)
        try:
            if got is None:
                raise LookupError(f"record {c.record_id} or its waveform is missing")
            if isinstance(got, Exception):
                raise got
            record, asset, samples = got
            t0 = time.perf_counter()
            analysis = analyse(record, asset, samples)
            if heartbeat is not None:
                heartbeat.observe("analysis_seconds", time.perf_counter() - t0)
        except DamagedWaveform as exc:  # damage does not heal: no retry, the job keeps the reason
            log.error("job %s: %s", c.job_id, exc)
            fail(db, c, str(exc), permanent=True, settings=settings)
            continue
        except SignalError as exc:  # the same record fails the same way every time: no retry
            fail(db, c, f"{getattr(exc, 'field', 'samples')}: {exc}", permanent=True, settings=settings)
            continue
        except Exception as exc:
            log.exception("job %s attempt %s failed", c.job_id, c.attempt)
            fail(db, c, f"{type(exc).__name__}: {exc}", permanent=False, settings=settings)
            continue
        ready.append(Analysed(c, record, analysis, samples))
    return ready


def process_batch(db, settings, claims: list[Claim], heartbeat=None, *, alarms: bool = True) -> None:
    """Analyse claimed jobs (outside any transaction) and store their results in one write transaction."""
    ready = _analyse_claims(db, settings, claims, heartbeat)
    if not ready:
        return
    for item, outcome in zip(ready, store_batch(db, ready, settings, alarms=alarms), strict=True):
        if isinstance(outcome, LeaseLost):
            log.warning("%s; result discarded", outcome)
        elif isinstance(outcome, Exception):
            fail(db, item.claim, f"storing the result failed: {type(outcome).__name__}: {outcome}",
                 permanent=False, settings=settings)


def run_forever(db, settings, *, stop: threading.Event | None = None, max_jobs: int | None = None,
                worker_id: str | None = None, alarms: bool = True) -> int:
    """Work until ``stop`` is set (or ``max_jobs`` jobs are done); returns the number of jobs handled.

    Jobs are claimed ``settings.worker_batch`` at a time: one claim statement, one read for their records
    and one write transaction for their results (a savepoint per job). ``alarms=False`` skips the alarm
    rules; only benchmarks pass it, to show the worker's own share of the time."""
    from sqlalchemy.exc import OperationalError

    stop = stop or threading.Event()
    worker_id = worker_id or default_worker_id()
    handled = 0
    log.info("worker %s started", worker_id)
    beat = start_heartbeat(db, worker_id, settings)
    alarm_stop, alarm_thread = _start_alarm_background(db, settings)
    retention_stop = threading.Event()
    retention_thread = _start_retention_background(db, settings, retention_stop)
    try:
        while not stop.is_set() and (max_jobs is None or handled < max_jobs):
            beat.beat("running")
            try:
                want = settings.worker_batch if max_jobs is None else min(settings.worker_batch,
                                                                          max_jobs - handled)
                claims = claim_batch(db, worker_id, lease_s=settings.lease_s,
                                     max_attempts=settings.max_attempts, n=want)
                if claims:
                    process_batch(db, settings, claims, beat, alarms=alarms)
                    handled += len(claims)
                    continue
            except OperationalError as exc:  # database busy or unreachable: wait, then try again
                log.warning("worker %s: database unavailable (%s)", worker_id, exc.orig)
                time.sleep(min(5.0, settings.worker_poll_s * 10))
            stop.wait(settings.worker_poll_s)
    finally:
        retention_stop.set()
        if alarm_thread is not None:
            alarm_stop.set()
            alarm_thread.join(settings.smtp_timeout_s + 5.0)
        if retention_thread is not None:
            retention_thread.join(30.0)
        beat.beat("stopped", force=True)
    return handled


def _start_retention_background(db, settings, stop: threading.Event):
    """Every ``retention_interval_h`` hours (0: never), apply waveform retention in a thread
    (server/retention/apply.py: short batches, so the job loop's writes interleave with it)."""
    if settings.retention_interval_h <= 0:
        return None

    def loop():
        from server.retention.apply import run

        while not stop.wait(settings.retention_interval_h * 3600.0):
            try:
                run(db, settings, actor="worker retention")
            except Exception:  # logged; the next interval tries again
                log.exception("retention run failed")

    thread = threading.Thread(target=loop, name="retention", daemon=True)
    thread.start()
    return thread


def _start_alarm_background(db, settings):
    """Alert emails and operating-window fits run beside the job loop in their own thread, so a slow SMTP
    server never holds up an analysis (server.alarms.run_mailer_forever; the outbox leases make a separate
    ``halfwatch mailer`` safe as well). Off with HALFWATCH_WORKER_ALARM_BACKGROUND=false."""
    if not settings.worker_alarm_background:
        return None, None
    from server.alarms import run_mailer_forever

    alarm_stop = threading.Event()
    thread = threading.Thread(target=run_mailer_forever, args=(db, settings, alarm_stop),
                              name="alarm-background", daemon=True)
    thread.start()
    return alarm_stop, thread
