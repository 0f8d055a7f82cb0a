"""Writing results: the ``results`` row and its chart arrays, compaction of raw waveforms, superseding an
earlier result, and the alarm rules, each job in the same transaction as its fence (server/worker/claim.py).

Nothing else in the worker writes a result; the loop (server/worker/loop.py) calls ``store_batch``.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from types import SimpleNamespace

from sqlalchemy import bindparam, insert, update

from server.storage import blobs
from server.storage.packing import pack_chart
from server.storage.result_columns import result_columns
from server.storage.tables import Result, Waveform, utcnow
from server.worker.claim import _DONE, Claim, LeaseLost, _fence, _fence_batch

log = logging.getLogger("halfwatch.worker")

SPECTRUM_POINTS = 2048
ENVELOPE_POINTS = 1000


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


