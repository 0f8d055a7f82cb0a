"""Store one record and queue its analysis, in one transaction.

``ingest_record`` is the one way records enter the store: the HTTP API, route uploads and the MQTT
bridge all call it. It validates the record against the analysis core's checks and the service's
limits, then commits the record, its waveform and an analysis job together. A repeat with the same
``client_ref`` for the same point returns the first record (``created=False``), never a duplicate.
"""

from __future__ import annotations

import datetime as dt
import math
import threading
from dataclasses import dataclass

import numpy as np
from sqlalchemy import Float, Integer, String, bindparam, insert, select
from sqlalchemy.exc import IntegrityError

from server.errors import AppError, Conflict, Forbidden, NotFound, PayloadTooLarge
from server.storage import blobs
from server.storage.group_commit import GroupCommit
from server.storage.tables import ORIGINS, Area, Asset, Job, Point, Record, UTCDateTime, Waveform, utcnow
from server.tach import check_speed_agrees, tach_from_input
from server.tach.tables import RecordTach
from server.times import to_utc


@dataclass(frozen=True)
class IngestOutcome:
    record_id: int
    created: bool
    job_id: int | None


@dataclass(frozen=True)
class Limits:
    max_samples: int = 4_194_304
    min_samples: int = 256
    min_sample_rate_hz: float = 100.0
    max_sample_rate_hz: float = 200_000.0
    max_future_s: float = 300.0

    @classmethod
    def from_settings(cls, settings) -> Limits:
        return cls(settings.max_samples, settings.min_samples, settings.min_sample_rate_hz,
                   settings.max_sample_rate_hz, settings.max_future_s)


def check_signal(samples, fs_hz, units: str | None, limits: Limits) -> tuple[np.ndarray, float, str]:
    """Return (float32 samples, fs, canonical units) or raise an AppError/SignalError naming the field."""
    from analysis.record.validate import normalize_units, validate_samples

    try:
        fs = float(fs_hz)
    except (TypeError, ValueError):
        raise AppError(f"fs_hz (sample rate) {fs_hz!r} is not a number; give it in Hz, e.g. 25600",
                       field="fs_hz") from None
    if not math.isfinite(fs) or not limits.min_sample_rate_hz <= fs <= limits.max_sample_rate_hz:
        raise AppError(f"fs_hz (sample rate) {fs_hz!r} Hz is outside this service's range "
                       f"{limits.min_sample_rate_hz:g}-{limits.max_sample_rate_hz:g} Hz", field="fs_hz")
    n = int(np.size(samples))
    if n > limits.max_samples:
        raise PayloadTooLarge(f"the record has {n} samples; this service takes at most {limits.max_samples} "
                              "per record, split it", field="samples")
    canonical = normalize_units(units)
    x, fs = validate_samples(samples, fs)
    if x.size < limits.min_samples:
        raise AppError(f"the record has only {x.size} samples; send at least {limits.min_samples}",
                       field="samples")
    x32 = blobs.as_f4(x)
    if not np.all(np.isfinite(x32)):
        raise AppError("samples overflow 32-bit floats; check the units and the scaling", field="samples")
    return x32, fs, canonical


def check_time(measured_at: dt.datetime, limits: Limits, now: dt.datetime | None = None) -> dt.datetime:
    if not isinstance(measured_at, dt.datetime):
        raise AppError("measured_at must be a time, e.g. 2026-03-01T08:00:00Z", field="measured_at")
    if measured_at.tzinfo is None or measured_at.utcoffset() is None:
        raise AppError("measured_at has no time zone; add Z or an offset such as +01:00", field="measured_at")
    try:
        measured_at = to_utc(measured_at)
    except ValueError as exc:
        raise AppError(f"measured_at {exc}", field="measured_at", status=422, code="invalid") from None
    now = now or utcnow()
    if measured_at > now + dt.timedelta(seconds=limits.max_future_s):
        raise AppError(f"measured_at {measured_at.isoformat()} is in the future (server time "
                       f"{now.isoformat(timespec='seconds')}); check the sensor clock", field="measured_at")
    if measured_at.year < 1990:
        raise AppError(f"measured_at {measured_at.isoformat()} is before 1990; check the sensor clock",
                       field="measured_at")
    return measured_at


def check_speed(speed_hz) -> float | None:
    if speed_hz is None:
        return None
    try:
        v = float(speed_hz)
    except (TypeError, ValueError):
        raise AppError(f"speed_hz {speed_hz!r} is not a number; give the shaft speed in Hz (rev/s)",
                       field="speed_hz") from None
    if not math.isfinite(v) or v <= 0 or v > 2000:
        raise AppError(f"speed_hz {speed_hz!r} is not a shaft speed; give rev/s between 0 and 2000 "
                       "(divide r/min by 60)", field="speed_hz")
    return v


# statements built once (building them per request costs about as much as running them)
_POINT_SITE = (select(Point.id, Area.site_id).join(Asset, Asset.id == Point.asset_id)
               .join(Area, Area.id == Asset.area_id).where(Point.id == bindparam("pid")))
_FIRST = select(Record.id, Record.checksum).where(Record.point_id == bindparam("pid"),
                                                  Record.client_ref == bindparam("ref"))
_FIRST_JOB = select(Job.id).where(Job.record_id == bindparam("rid")).order_by(Job.id).limit(1)
_INSERT_RECORD = insert(Record.__table__).returning(Record.__table__.c.id)
_RECORD_COLUMNS = {"measured_at": UTCDateTime(), "received_at": UTCDateTime(), "fs_hz": Float(),
                   "n_samples": Integer(), "units": String(), "speed_hz": Float(), "speed_source": String(),
                   "origin": String(), "uploader": String(), "client_ref": String(), "checksum": String()}


def _insert_record_checked(scoped: bool):
    """INSERT INTO records (...) SELECT <values> FROM points [JOIN assets, areas] WHERE the point exists
    [and lies in the key's site] RETURNING id: the point check and the insert in one statement; no row
    means the point is missing or out of scope (``point_site`` then says which)."""
    values = [bindparam(name, type_=type_) for name, type_ in _RECORD_COLUMNS.items()]
    pick = select(Point.id, *values).where(Point.id == bindparam("point_id"))
    if scoped:
        pick = (pick.join(Asset, Asset.id == Point.asset_id).join(Area, Area.id == Asset.area_id)
                .where(Area.site_id == bindparam("site_scope")))
    return (insert(Record.__table__).from_select(["point_id", *_RECORD_COLUMNS], pick)
            .returning(Record.__table__.c.id))


_INSERT_CHECKED = {False: _insert_record_checked(False), True: _insert_record_checked(True)}
_INSERT_WAVEFORM = insert(Waveform.__table__)
_INSERT_TACH = insert(RecordTach.__table__)
_INSERT_JOB = insert(Job.__table__).returning(Job.__table__.c.id)
# group commit: several records per statement (ids come back in the order of the parameter sets)
_INSERT_RECORDS = insert(Record.__table__).returning(Record.__table__.c.id, sort_by_parameter_order=True)
_INSERT_JOBS = insert(Job.__table__).returning(Job.__table__.c.id, sort_by_parameter_order=True)
_POINT_SITES = (select(Point.id, Area.site_id).join(Asset, Asset.id == Point.asset_id)
                .join(Area, Area.id == Asset.area_id).where(Point.id.in_(bindparam("pids", expanding=True))))
_FIRSTS = select(Record.id, Record.point_id, Record.client_ref, Record.checksum).where(
    Record.point_id.in_(bindparam("pids", expanding=True)),
    Record.client_ref.in_(bindparam("refs", expanding=True)))


def point_site(conn, point_id: int) -> tuple[int, int]:
    """(point id, site id) of a point; NotFound names the field."""
    row = conn.execute(_POINT_SITE, {"pid": point_id}).first()
    if row is None:
        raise NotFound(f"no measurement point {point_id}; see GET /api/v1/tree", field="point_id")
    return row[0], row[1]


def ingest_record(db, *, point_id: int, samples, fs_hz: float, units: str | None, measured_at: dt.datetime,
                  speed_hz: float | None = None, speed_source: str | None = None, origin: str = "api",
                  uploader: str = "", client_ref: str | None = None, limits: Limits | None = None,
                  site_scope: int | None = None, source_name: str | None = None,
                  source_bytes: bytes | None = None, session=None, tach_pulses_s=None, tach_samples=None,
                  pulses_per_rev: int | None = None, tach_level: float | None = None,
                  tach_field: str = "tach_samples") -> IngestOutcome:
    """Validate and store one record with its analysis job; see the module docstring.

    Tach pulses (``tach_pulses_s``: times in s from the first sample, or ``tach_samples``: a pulse channel
    sampled with the record; ``tach_field`` names it in refusals) are checked (server/tach) and stored
    with the record in ``record_tach``; without ``speed_hz`` their mean speed becomes the record's speed
    (source "tach").

    ``site_scope`` limits the call to points of one site (API keys scoped to a site). With ``session``
    the caller owns the transaction (the record is stored in it, uncommitted).
    """
    limits = limits or Limits()
    if origin not in ORIGINS:
        raise AppError(f"origin {origin!r} is not one of {', '.join(ORIGINS)}", field="origin")
    if client_ref is not None:
        client_ref = str(client_ref).strip() or None
        if client_ref is not None and len(client_ref) > 200:
            raise AppError("client_ref is longer than 200 characters", field="client_ref")
    x32, fs, canonical = check_signal(samples, fs_hz, units, limits)
    measured_at = check_time(measured_at, limits)
    speed = check_speed(speed_hz)
    tach = tach_from_input(n_samples=int(x32.size), fs_hz=fs, pulses_s=tach_pulses_s, channel=tach_samples,
                           pulses_per_rev=pulses_per_rev, level=tach_level, channel_field=tach_field)
    check_speed_agrees(speed, tach)
    if tach is not None and speed is None:
        speed, speed_source = tach.mean_speed_hz, "tach"
    tach_row = tach.row() if tach is not None else None
    digest = blobs.checksum(x32)

    def _scope(conn) -> None:
        _, site_id = point_site(conn, point_id)
        if site_scope is not None and site_scope != site_id:
            raise Forbidden(f"this API key is limited to site {site_scope}; point {point_id} is elsewhere",
                            field="point_id")

    def _check(conn) -> IngestOutcome | None:
        _scope(conn)
        return _existing(conn, point_id, client_ref, digest) if client_ref is not None else None

    def _encode():  # raw float32 in the database (the worker compacts it) or a durable file, before commit
        packed_source = blobs.compress(source_bytes) if source_bytes is not None else None
        return db.waveforms.row(digest, x32, source_name=source_name, source_bytes=packed_source)

    def _row(now) -> dict:
        return dict(point_id=point_id, measured_at=measured_at, received_at=now, fs_hz=fs,
                    n_samples=int(x32.size), units=canonical, speed_hz=speed,
                    speed_source=(speed_source or "given") if speed else None, origin=origin,
                    uploader=uploader[:120], client_ref=client_ref, checksum=digest)

    def _store(conn, wave: dict, *, checked: bool = False) -> IngestOutcome:
        now = utcnow()
        if checked:  # the point (and the key's site) checked by the insert itself
            row = dict(_row(now), site_scope=site_scope)
            rid = conn.execute(_INSERT_CHECKED[site_scope is not None], row).scalar()
            if rid is None:
                _scope(conn)  # raises NotFound or Forbidden naming the point
                raise NotFound(f"no measurement point {point_id}; see GET /api/v1/tree", field="point_id")
        else:
            rid = conn.execute(_INSERT_RECORD, _row(now)).scalar_one()
        conn.execute(_INSERT_WAVEFORM, dict(wave, record_id=rid))
        if tach_row is not None:
            conn.execute(_INSERT_TACH, dict(tach_row, record_id=rid))
        jid = conn.execute(_INSERT_JOB, dict(record_id=rid, state="queued", reason="ingest", attempts=0,
                                             not_before=now, created_at=now, lease_until=None, worker_id=None,
                                             error=None, finished_at=None)).scalar_one()
        return IngestOutcome(rid, True, jid)

    if session is not None:
        conn = session.connection()
        first = _check(conn)
        return first if first is not None else _store(conn, _encode())
    wave = _encode()

    def alone() -> IngestOutcome:
        try:  # one transaction; a repeated client_ref trips the unique constraint and is answered below
            with db.write() as conn:
                return _store(conn, wave, checked=True)
        except IntegrityError:
            if client_ref is None:
                raise
            with db.read_engine.connect() as conn:  # another request with the same reference won the race
                first = _existing(conn, point_id, client_ref, digest)
            if first is None:
                raise
            return first

    return _group(db).submit(_Pending(point_id, site_scope, client_ref, digest, _row(utcnow()), wave, alone,
                                      tach_row))


@dataclass
class _Pending:
    """One validated record waiting for the next group commit (its waveform file, if any, already durable)."""

    point_id: int
    site_scope: int | None
    client_ref: str | None
    digest: str
    row: dict
    wave: dict
    alone: object  # stores it in a transaction of its own (the fallback)
    tach: dict | None = None  # its record_tach row (without record_id), if it came with tach pulses


_GROUPS_LOCK = threading.Lock()


def _group(db) -> GroupCommit:
    """The group committer of this database (one per Database, made on first use)."""
    group = getattr(db, "_ingest_group", None)
    if group is None:
        with _GROUPS_LOCK:
            group = getattr(db, "_ingest_group", None)
            if group is None:
                group = db._ingest_group = GroupCommit(lambda items: _store_batch(db, items),
                                                       getattr(db, "group_commit_max", 32))
    return group


def _store_batch(db, items) -> list:
    """Store a batch of records in one transaction: one point/site read, one read of earlier client_refs,
    then one INSERT each for records, waveforms and jobs. Per item, the IngestOutcome or the error that
    concerns it. A constraint that trips (a race with another process) stores the batch one by one."""
    if len(items) == 1:
        return [_outcome(items[0].alone)]
    try:
        with db.write() as conn:
            out = _batch_in(conn, items)
    except IntegrityError:
        return [_outcome(item.alone) for item in items]
    return out


def _outcome(fn):
    try:
        return fn()
    except Exception as exc:  # handed to that request's caller
        return exc


def _batch_in(conn, items) -> list:
    pids = sorted({it.point_id for it in items})
    sites = dict(conn.execute(_POINT_SITES, {"pids": pids}).all())
    refs = sorted({it.client_ref for it in items if it.client_ref is not None})
    earlier = {(r.point_id, r.client_ref): r for r in conn.execute(_FIRSTS, {"pids": pids, "refs": refs})} \
        if refs else {}
    out: list = [None] * len(items)
    new, first_of = [], {}
    for i, it in enumerate(items):
        site = sites.get(it.point_id)
        if site is None:
            out[i] = NotFound(f"no measurement point {it.point_id}; see GET /api/v1/tree", field="point_id")
        elif it.site_scope is not None and it.site_scope != site:
            out[i] = Forbidden(f"this API key is limited to site {it.site_scope}; point {it.point_id} is "
                               "elsewhere", field="point_id")
        elif it.client_ref is not None and (it.point_id, it.client_ref) in earlier:
            try:
                out[i] = _existing(conn, it.point_id, it.client_ref, it.digest)
            except AppError as exc:
                out[i] = exc
        elif it.client_ref is not None and (it.point_id, it.client_ref) in first_of:
            out[i] = ("same as", first_of[(it.point_id, it.client_ref)])  # a repeat within this batch
        else:
            if it.client_ref is not None:
                first_of[(it.point_id, it.client_ref)] = i
            new.append(i)
    if new:
        rids = conn.execute(_INSERT_RECORDS, [items[i].row for i in new]).scalars().all()
        conn.execute(_INSERT_WAVEFORM, [dict(items[i].wave, record_id=rid)
                                        for i, rid in zip(new, rids, strict=True)])
        tachs = [dict(items[i].tach, record_id=rid)
                 for i, rid in zip(new, rids, strict=True) if items[i].tach is not None]
        if tachs:
            conn.execute(_INSERT_TACH, tachs)
        now = utcnow()
        jids = conn.execute(_INSERT_JOBS, [dict(record_id=rid, state="queued", reason="ingest", attempts=0,
                                                not_before=now, created_at=now, lease_until=None,
                                                worker_id=None, error=None, finished_at=None)
                                           for rid in rids]).scalars().all()
        for i, rid, jid in zip(new, rids, jids, strict=True):
            out[i] = IngestOutcome(rid, True, jid)
    for i, o in enumerate(out):
        if isinstance(o, tuple):
            first, it = out[o[1]], items[i]
            out[i] = (IngestOutcome(first.record_id, False, first.job_id) if it.digest == items[o[1]].digest
                      else Conflict(f"client_ref {it.client_ref!r} was already used for record "
                                    f"{first.record_id} with different samples; use a new reference for a "
                                    "new record", field="client_ref"))
    return out


def _existing(s, point_id: int, client_ref: str, digest: str) -> IngestOutcome | None:
    row = s.execute(_FIRST, {"pid": point_id, "ref": client_ref}).first()
    if row is None:
        return None
    if row.checksum != digest:
        raise Conflict(f"client_ref {client_ref!r} was already used for record {row.id} with different "
                       "samples; use a new reference for a new record", field="client_ref")
    job_id = s.execute(_FIRST_JOB, {"rid": row.id}).scalar()
    return IngestOutcome(row.id, False, job_id)
