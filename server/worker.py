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
import zlib
from dataclasses import dataclass
from types import SimpleNamespace

from sqlalchemy import and_, bindparam, insert, or_, select, tuple_, update

from server.storage import blobs
from server.storage.packing import pack_chart
from server.storage.result_columns import result_columns
from server.storage.tables import Asset, Job, Point, Record, Result, Waveform, utcnow
from server.storage.waveforms import MissingWaveformFile
from server.tach.tables import RecordTach

log = logging.getLogger("halfwatch.worker")

SPECTRUM_POINTS = 2048
ENVELOPE_POINTS = 1000


class DamagedWaveform(RuntimeError):
    """The stored samples of a record are unreadable or differ from the checksum taken at ingest."""


class LeaseLost(RuntimeError):
    """The job's lease expired and someone else owns it now; this worker's result is discarded."""


@dataclass(frozen=True)
class Claim:
    job_id: int
    record_id: int
    attempt: int
    worker_id: str
    reason: str = ""  # "ingest": the record's first analysis, so no earlier result to supersede


def default_worker_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


_J = Job.__table__.c
_EXPIRE = (update(Job.__table__)
           .where(_J.state == "running", _J.lease_until < bindparam("now"),
                  _J.attempts >= bindparam("max_attempts"))
           .values(state="failed", finished_at=bindparam("now"), lease_until=None, error=bindparam("why")))
# A time further ahead than any worker could have set it (``horizon`` = now + lease + CLOCK_SLACK) means
# the clock was stepped back: such a job is due now instead of parked for the size of the step.
CLOCK_SLACK = dt.timedelta(minutes=10)
_RUNNABLE = or_(and_(_J.state == "queued", or_(_J.not_before <= bindparam("now"),
                                               _J.not_before > bindparam("horizon"))),
                and_(_J.state == "running", or_(_J.lease_until < bindparam("now"),
                                                _J.lease_until > bindparam("horizon"))))
_CLAIMS: dict[tuple[bool, int], object] = {}


def _claim_statement(skip_locked: bool, n: int):
    """UPDATE the n oldest runnable jobs ... RETURNING, built once per (backend, n).

    One job: ``WHERE id = (SELECT ... LIMIT 1 [FOR UPDATE SKIP LOCKED])``. Several on PostgreSQL: the locked
    pick goes into a CTE joined with ``UPDATE ... FROM`` (an ``IN (SELECT ... SKIP LOCKED)`` form let
    concurrent claimers come back empty-handed while jobs were still queued). Several on SQLite (one writer
    at a time): ``WHERE id IN (SELECT ... LIMIT n)``."""
    key = (skip_locked, n)
    if key not in _CLAIMS:
        pick = select(_J.id).where(_RUNNABLE).order_by(_J.id).limit(n)
        if skip_locked:
            pick = pick.with_for_update(skip_locked=True)
        if n == 1:
            target = _J.id == pick.scalar_subquery()
        elif skip_locked:
            picked = pick.cte("picked")
            target = _J.id == picked.c.id
        else:
            target = _J.id.in_(pick.scalar_subquery())
        _CLAIMS[key] = (update(Job.__table__).where(target, _RUNNABLE)
                        .values(state="running", attempts=_J.attempts + 1, worker_id=bindparam("wid"),
                                lease_until=bindparam("lease_until"))
                        .returning(_J.id, _J.record_id, _J.attempts, _J.reason))
    return _CLAIMS[key]


def claim_batch(db, worker_id: str, *, lease_s: float, max_attempts: int, n: int = 1,
                now: dt.datetime | None = None) -> list[Claim]:
    """Claim up to n of the oldest runnable jobs (queued, or running with an expired lease), oldest first."""
    now = now or utcnow()
    why = (f"lease expired on attempt {max_attempts} of {max_attempts}: the worker stopped during the "
           "analysis (crashed or killed)")
    with db.write() as conn:
        # leases that ran out on the last allowed attempt: give up on them
        conn.execute(_EXPIRE, {"now": now, "max_attempts": max_attempts, "why": why})
        lease_until = now + dt.timedelta(seconds=lease_s)
        rows = conn.execute(_claim_statement(db.dialect == "postgresql", max(1, int(n))), {
            "now": now, "horizon": lease_until + CLOCK_SLACK, "wid": worker_id,
            "lease_until": lease_until}).all()
    return sorted((Claim(r[0], r[1], r[2], worker_id, r[3] or "") for r in rows), key=lambda c: c.job_id)


def claim(db, worker_id: str, *, lease_s: float, max_attempts: int, now: dt.datetime | None = None):
    """Claim the oldest runnable job; None if there is none."""
    got = claim_batch(db, worker_id, lease_s=lease_s, max_attempts=max_attempts, n=1, now=now)
    return got[0] if got else None


def forcing_args(record: Record, asset: Asset) -> dict:
    """The asset says what the forcing is (shaft speed x multiplier); a measured speed is exact."""
    mult = asset.forcing_multiplier or 1.0
    if record.speed_hz:
        return {"forcing_hz": record.speed_hz * mult}
    return {"nominal_hz": asset.nominal_speed_hz * mult}


_RT = Record.__table__
_LOAD = (select(_RT, Waveform.codec.label("wf_codec"), Waveform.data.label("wf_data"),
                Waveform.store.label("wf_store"), Waveform.digest.label("wf_digest"),
                RecordTach.pulses.label("tach_pulses"), RecordTach.pulses_per_rev.label("tach_per_rev"))
         .join(Waveform, Waveform.record_id == _RT.c.id)
         .outerjoin(RecordTach, RecordTach.record_id == _RT.c.id)  # tach pulses, if any (server/tach)
         .where(_RT.c.id.in_(bindparam("rids", expanding=True))))
_ASSETS = (select(Point.id.label("of_point"), Asset.__table__).join(Point, Point.asset_id == Asset.id)
           .where(Point.id.in_(bindparam("pids", expanding=True))))


def load_many(db, record_ids) -> dict[int, tuple | Exception]:
    """{record id: (record row, asset row, samples) or the DamagedWaveform/ValueError that load raises}.

    Two reads for the whole batch (records with their waveforms, then the assets of their points). Raw
    samples are a read-only view of the stored bytes (no copy); compacted ones are decoded once."""
    with db.read_engine.connect() as conn:
        records = conn.execute(_LOAD, {"rids": list(record_ids)}).all()
        pids = sorted({r.point_id for r in records})
        assets = {a.of_point: a for a in conn.execute(_ASSETS, {"pids": pids})}
    out: dict[int, tuple | Exception] = {}
    for record in records:
        try:
            out[record.id] = (record, assets[record.point_id], _samples(record, db.waveforms))
        except (DamagedWaveform, ValueError) as exc:
            out[record.id] = exc
    return out


def _samples(record, store):
    """The checked samples of a row with ``wf_codec``/``wf_data``/``wf_store``/``wf_digest`` (see ``load``);
    ``store`` (server/storage/waveforms.py) reads those kept as files."""
    try:
        samples = blobs.decode_waveform(*store.blob(record.wf_store, record.wf_digest, record.wf_codec,
                                                    record.wf_data))
    except MissingWaveformFile as exc:
        raise DamagedWaveform(f"record {record.id}: {exc}; restore the file from a backup") from None
    except (ValueError, zlib.error) as exc:
        if str(exc).startswith("unknown waveform codec"):
            raise  # written by a newer version, perhaps: retried, another worker may know the codec
        raise DamagedWaveform(f"record {record.id}: the stored waveform cannot be decoded ({exc})") from None
    if record.checksum and blobs.checksum(samples) != record.checksum:
        raise DamagedWaveform(f"record {record.id}: the stored waveform does not match its ingest checksum "
                              "(damaged in storage); re-send the record or restore it from a backup")
    return samples


def load(db, record_id: int):
    """(record row, asset row, samples); rows have the tables' column names as attributes.

    The samples are checked against the checksum taken at ingest: a damaged blob raises DamagedWaveform
    instead of being analysed as if it were a measurement."""
    got = load_many(db, [record_id]).get(record_id)
    if got is None:
        raise LookupError(f"record {record_id} or its waveform is missing")
    if isinstance(got, Exception):
        raise got
    return got


def analyse(record: Record, asset: Asset, samples):
    import numpy as np

    from analysis import analyze_record

    tach = {}
    pulses = getattr(record, "tach_pulses", None)  # stored with the record (server/tach): track by tach
    if pulses is not None:
        tach = dict(tach_pulses_s=np.frombuffer(pulses, dtype="<f8"),
                    pulses_per_rev=getattr(record, "tach_per_rev", 1))
    return analyze_record(samples, record.fs_hz, units=record.units, machine_group=asset.machine_group,
                          foundation=asset.foundation, **forcing_args(record, asset), **tach)


def result_values(record, analysis) -> tuple[dict, dict]:
    """(column values of the ``results`` row, the analysis as a dict); the JSON is encoded here, once."""
    data = analysis.to_dict()
    values = dict(
        record_id=record.id, point_id=record.point_id, measured_ts=record.measured_at.timestamp(),
        analysis_version=str(data.get("version", "")), current=True, created_at=utcnow(),
        data=json.dumps(data, separators=(",", ":"), check_circular=False),
        spectrum=chart_blob(record.units, analysis),
        **result_columns(analysis),
    )
    return values, data


def chart_blob(units: str, analysis) -> bytes:
    """The compact chart arrays of a result (server/storage/packing.py): the spectrum and the 0.5X envelope,
    max-hold decimated to SPECTRUM_POINTS / ENVELOPE_POINTS, log-quantised, compressed."""
    return pack_chart({"units": units, "amplitude": "peak"}, {
        ("freqs_hz", "amplitude"): (analysis.spectrum.freqs_hz, analysis.spectrum.amplitude, SPECTRUM_POINTS),
        ("envelope_t_s", "envelope"): (analysis.envelope_t_s, analysis.envelope, ENVELOPE_POINTS)})


def result_row(record, analysis) -> SimpleNamespace:
    """The ``results`` row the worker would insert, as attributes (``data`` is the JSON text)."""
    return SimpleNamespace(**result_values(record, analysis)[0])


_FENCE = update(Job.__table__).where(_J.id == bindparam("jid"), _J.worker_id == bindparam("wid"),
                                     _J.attempts == bindparam("attempt"), _J.state == "running")
_DONE = _FENCE.values(state="done", finished_at=bindparam("t"), lease_until=None, error=None)
_DONE_MANY = (update(Job.__table__)
              .where(tuple_(_J.id, _J.attempts).in_(bindparam("pairs", expanding=True)),
                     _J.worker_id == bindparam("wid"), _J.state == "running")
              .values(state="done", finished_at=bindparam("t"), lease_until=None, error=None)
              .returning(_J.id))


def _fence(conn, c: Claim, statement=None, **values) -> None:
    params = {"jid": c.job_id, "wid": c.worker_id, "attempt": c.attempt}
    if statement is None:
        statement = _FENCE.values(**values)
    else:
        params["t"] = utcnow()
    done = conn.execute(statement, params)
    if done.rowcount != 1:
        raise LeaseLost(f"job {c.job_id} attempt {c.attempt} is no longer leased to {c.worker_id}")


_COMPACT = (update(Waveform.__table__)
            .where(Waveform.__table__.c.record_id == bindparam("rid"),
                   Waveform.__table__.c.codec == blobs.RAW_CODEC, Waveform.__table__.c.store == "database")
            .values(codec=bindparam("codec"), data=bindparam("data")))
_SUPERSEDE = (update(Result.__table__).where(Result.__table__.c.record_id == bindparam("rid"),
                                             Result.__table__.c.current.is_(True)).values(current=False))
_INSERT_RESULT = insert(Result.__table__).returning(Result.__table__.c.id)


@dataclass
class Analysed:
    """One claimed job ready to store: its record row, the analysis and the samples (for compaction)."""

    claim: Claim
    record: object
    analysis: object
    samples: object = None


def _prepare(item: Analysed) -> tuple[dict, dict, tuple | None]:
    """Everything that needs no database, done before the write transaction opens."""
    values, data = result_values(item.record, item.analysis)
    packed = None
    if (item.samples is not None and getattr(item.record, "wf_codec", blobs.RAW_CODEC) == blobs.RAW_CODEC
            and getattr(item.record, "wf_store", "database") == "database"):  # files stay as named
        packed = blobs.encode_waveform(item.samples)
    return values, data, packed


def _fence_batch(conn, items: list[Analysed]) -> set[int]:
    """Mark the batch's jobs done in one statement; the ids still leased to this worker at their attempt."""
    wid = items[0].claim.worker_id
    if any(item.claim.worker_id != wid for item in items):
        raise ValueError("one batch, one worker")
    pairs = [(item.claim.job_id, item.claim.attempt) for item in items]
    return set(conn.execute(_DONE_MANY, {"pairs": pairs, "wid": wid, "t": utcnow()}).scalars())


def _store_one(s, item: Analysed, prepared, settings, alarms: bool, now=None, *, fenced: bool = False) -> int:
    """Store one analysed job. ``fenced``: its job was already marked done and its waveform compacted by
    the batch's statements (``store_batch``); otherwise both are done here."""
    values, data, packed = prepared
    conn, record = s.connection(), item.record
    if not fenced:
        _fence(conn, item.claim, _DONE)
        if packed is not None:
            conn.execute(_COMPACT, {"rid": record.id, "codec": packed[0], "data": packed[1]})
    if item.claim.reason != "ingest":  # a re-analysis: the earlier result stops being current
        conn.execute(_SUPERSEDE, {"rid": record.id})
    result_id = conn.execute(_INSERT_RESULT, values).scalar_one()
    if alarms:
        from server.alarms import evaluate_result

        evaluate_result(s, record, SimpleNamespace(**{**values, "id": result_id, "data": data}),
                        settings=settings, now=now)
    return result_id


def store(db, c: Claim, record, analysis, settings=None, samples=None, *, alarms: bool = True,
          now=None) -> int:
    """Store the result, mark the job done and run the alarm rules, all in one transaction.

    With ``samples``, a waveform still stored raw is compacted in the same transaction. The alarm rules get
    ``record`` and a ``result`` object with the ``results`` columns as attributes (``data`` as a dict).
    ``alarms=False`` skips the rules (benchmarks only: it measures the worker's own share); ``now`` is the
    alarm rules' clock (default the current time; the demo backfill passes each reading's own time)."""
    item = Analysed(c, record, analysis, samples)
    prepared = _prepare(item)
    with db.unit_of_work() as s:
        return _store_one(s, item, prepared, settings, alarms, now)


def store_batch(db, items: list[Analysed], settings=None, *, alarms: bool = True) -> list[int | Exception]:
    """Store several results in one write transaction; per item, the result id or the exception.

    Each job's fence, result, compaction and alarm evaluation run together, so they commit or roll back
    together. A job whose lease was lost is skipped (``LeaseLost``: the fence, its first statement, wrote
    nothing). Any other error rolls the batch back and the jobs are stored again one transaction each, so
    one job's failure never costs another its result (and the common case pays for no savepoints)."""
    # One lock order for every worker: the alarm evaluation locks each record's point (PostgreSQL), so two
    # batches that touch the same points in different orders could deadlock.
    items = sorted(items, key=lambda item: (item.record.point_id, item.claim.job_id))
    prepared = [_prepare(item) for item in items]
    try:
        out: list[int | Exception] = []
        with db.unit_of_work() as s:
            conn = s.connection()
            fenced = _fence_batch(conn, items)  # one statement marks every job of the batch done
            packs = [{"rid": item.record.id, "codec": prep[2][0], "data": prep[2][1]}
                     for item, prep in zip(items, prepared, strict=True)
                     if prep[2] is not None and item.claim.job_id in fenced]
            if packs:  # and one compacts their waveforms
                conn.execute(_COMPACT, packs)
            for item, prep in zip(items, prepared, strict=True):
                if item.claim.job_id not in fenced:  # the lease ran out and someone else owns the job
                    out.append(LeaseLost(f"job {item.claim.job_id} attempt {item.claim.attempt} is no longer "
                                         f"leased to {item.claim.worker_id}"))
                    continue
                out.append(_store_one(s, item, prep, settings, alarms, fenced=True))
        return out
    except Exception as exc:
        if len(items) == 1:
            log.exception("job %s: storing the result failed", items[0].claim.job_id)
            return [exc]
        log.warning("storing a batch of %d results failed (%s: %s); storing them one by one", len(items),
                    type(exc).__name__, exc)
    return [store_batch(db, [item], settings, alarms=alarms)[0] for item in items]


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
        with db.write() as conn:
            _fence(conn, c, **values)
    except LeaseLost:
        log.warning("job %s: lease lost before the failure could be recorded", c.job_id)


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
    from server.ops.heartbeat import Heartbeat  # /readyz and /metrics read it

    beat = Heartbeat(db, worker_id, "worker", interval_s=settings.heartbeat_s)
    beat.prune()
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
