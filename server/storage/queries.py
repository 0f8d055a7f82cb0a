"""Read-side queries for the dashboard: record detail, spectra, waveform, trend, waterfall."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
from sqlalchemy import Float, Integer, cast, func, select

from analysis.result_compat import upgrade_result_dict
from server.errors import AppError, NotFound
from server.storage.packing import unpack_arrays
from server.storage.tables import Job, Record, Result, Waveform
from server.storage.waveforms import MissingWaveformFile, store_for


def iso(t: dt.datetime | None) -> str | None:
    return None if t is None else t.astimezone(dt.UTC).isoformat().replace("+00:00", "Z")


#: trend metrics that are real columns of ``results`` (bucketed in SQL); other dotted paths into the
#: result JSON (e.g. ``orders.2X.accel_peak``) are read from the JSON.
METRIC_COLUMNS = {
    "subharmonic.accel_peak": Result.sub_accel_peak,
    "subharmonic.velocity_peak_mm_s": Result.sub_velocity_peak_mm_s,
    "subharmonic.velocity_rms_mm_s": Result.sub_velocity_rms_mm_s,
    "orders.1X.accel_peak": Result.one_x_accel_peak,
    "orders.1X.velocity_rms_mm_s": Result.one_x_velocity_rms_mm_s,
    "subharmonic.precursor.narrow_rate_per_s": Result.precursor_rate_per_s,
    "subharmonic.snr_db": Result.sub_snr_db,
    "subharmonic.frequency_hz": Result.sub_frequency_hz,
    "growth.rate_per_s": Result.growth_rate_per_s,
    "overall.velocity_rms_mm_s": Result.overall_velocity_rms_mm_s,
    "forcing.frequency_hz": Result.forcing_hz,
}


#: names of result version 1.0 that clients may still ask for -> the names that say their measure
METRIC_ALIASES = {
    "subharmonic.amplitude": "subharmonic.accel_peak",
    "subharmonic.velocity_mm_s": "subharmonic.velocity_peak_mm_s",
    "orders.1X.amplitude": "orders.1X.accel_peak",
    "orders.1X.velocity_mm_s": "orders.1X.velocity_peak_mm_s",
    "orders.2X.amplitude": "orders.2X.accel_peak",
    "orders.2X.velocity_mm_s": "orders.2X.velocity_peak_mm_s",
}


def record_dict(r: Record) -> dict:
    return {"id": r.id, "point_id": r.point_id, "measured_at": iso(r.measured_at),
            "received_at": iso(r.received_at), "fs_hz": r.fs_hz, "n_samples": r.n_samples,
            "duration_s": r.n_samples / r.fs_hz, "units": r.units, "speed_hz": r.speed_hz,
            "speed_source": r.speed_source, "origin": r.origin, "uploader": r.uploader,
            "client_ref": r.client_ref, "checksum": r.checksum}


def job_dict(j: Job) -> dict:
    return {"id": j.id, "record_id": j.record_id, "state": j.state, "attempts": j.attempts,
            "reason": j.reason, "error": j.error, "created_at": iso(j.created_at),
            "finished_at": iso(j.finished_at), "worker_id": j.worker_id, "lease_until": iso(j.lease_until)}


def current_result(s, record_id: int) -> Result | None:
    return s.scalar(select(Result).where(Result.record_id == record_id, Result.current.is_(True))
                    .order_by(Result.id.desc()).limit(1))


def get_record(s, record_id: int) -> Record:
    rec = s.get(Record, record_id)
    if rec is None:
        raise NotFound(f"no record {record_id}", field="record_id")
    return rec


def record_detail(s, record_id: int) -> dict:
    rec = get_record(s, record_id)
    job = s.scalar(select(Job).where(Job.record_id == record_id).order_by(Job.id.desc()).limit(1))
    res = current_result(s, record_id)
    from server.tach import tach_summary

    return {"ok": True, "record": record_dict(rec), "tach": tach_summary(s, record_id),
            "job": job_dict(job) if job else None,
            "result": None if res is None else {"id": res.id, "analysis_version": res.analysis_version,
                                                "created_at": iso(res.created_at),
                                                **upgrade_result_dict(json.loads(res.data))}}


#: what the chart arrays of a stored result are (their names are those of the stored blobs)
SPECTRUM_MEASURES = {"amplitude_measure": "acceleration peak of a sine, record units",
                     "envelope_measure": "acceleration peak envelope of the subharmonic band, record units"}


def record_spectrum(s, record_id: int) -> dict:
    get_record(s, record_id)
    res = current_result(s, record_id)
    if res is None:
        raise NotFound(f"record {record_id} has no analysis result yet; check its job", field="record_id")
    meta, arrays = unpack_arrays(res.spectrum)
    return {"ok": True, "record_id": record_id, "result_id": res.id, **meta,
            "forcing_hz": res.forcing_hz, **{k: v.tolist() for k, v in arrays.items()},
            **SPECTRUM_MEASURES}


def min_max_decimate(y: np.ndarray, max_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Indices and values keeping each bucket's minimum and maximum in time order (<= max_points)."""
    n = y.size
    if n <= max_points:
        return np.arange(n), y
    buckets = max(1, max_points // 2)
    edges = np.linspace(0, n, buckets + 1).astype(np.intp)
    lo, hi = edges[:-1], edges[1:]
    imin = np.array([a + int(np.argmin(y[a:b])) for a, b in zip(lo, hi, strict=True)])
    imax = np.array([a + int(np.argmax(y[a:b])) for a, b in zip(lo, hi, strict=True)])
    idx = np.sort(np.unique(np.concatenate([imin, imax])))
    return idx, y[idx]


def record_waveform(s, record_id: int, max_points: int) -> dict:
    rec = get_record(s, record_id)
    wf = s.get(Waveform, record_id)
    if wf is None:  # removed by retention (server/retention): the result and chart spectrum stay
        raise AppError(f"the raw waveform of reading {record_id} was removed by retention; its analysis "
                       f"result and spectrum are kept (GET /api/v1/records/{record_id}/retention says when)",
                       field="record_id", status=410, code="gone")
    try:  # in the database or a content-addressed file (server/storage/waveforms.py)
        x = store_for(s).samples(wf)
    except MissingWaveformFile as exc:
        raise AppError(f"the raw waveform of reading {record_id} cannot be read: {exc}; restore it from a "
                       "backup", field="record_id", status=503, code="waveform_missing") from None
    idx, y = min_max_decimate(x, max_points)
    return {"ok": True, "record_id": record_id, "units": rec.units, "fs_hz": rec.fs_hz,
            "n_samples": int(x.size), "decimated": bool(idx.size < x.size), "t_s": (idx / rec.fs_hz).tolist(),
            "value": y.astype(float).tolist()}


def _json_path(data: dict, path: str):
    cur = data
    for part in path.split("."):
        if not isinstance(cur, dict) or part not in cur:
            return None
        cur = cur[part]
    return cur if isinstance(cur, int | float) and not isinstance(cur, bool) else None


def trend(s, point_id: int, metric: str, t0: dt.datetime, t1: dt.datetime, max_points: int) -> dict:
    """Values of ``metric`` between t0 and t1; above max_points rows, min/max/mean per time bucket."""
    a, b = t0.timestamp(), t1.timestamp()
    if b <= a:
        raise AppError("end must be after start", field="end")
    metric = METRIC_ALIASES.get(metric, metric)
    scope = (Result.point_id == point_id, Result.current, Result.measured_ts >= a,
             Result.measured_ts <= b)
    col = METRIC_COLUMNS.get(metric)
    if col is not None:
        n = s.scalar(select(func.count()).where(*scope))  # index only; NULL values are dropped below
        if n <= max_points:
            rows = s.execute(select(Result.measured_ts, col).where(*scope, col.is_not(None))
                             .order_by(Result.measured_ts)).all()
            return _raw(metric, rows)
        bucket = time_bucket(s.bind.dialect.name, a, b, max_points)
        rows = s.execute(
            select(bucket, func.min(col), func.max(col), func.avg(cast(col, Float)), func.count(),
                   func.min(Result.measured_ts), func.max(Result.measured_ts))
            .where(*scope, col.is_not(None)).group_by(bucket).order_by(bucket)
        ).all()
        return _buckets(metric, [(r[5], r[6], r[1], r[2], r[3], r[4]) for r in rows], sum(r[4] for r in rows))
    if not all(p.replace("_", "").replace("X", "").isalnum() for p in metric.split(".")):
        raise AppError(f"metric {metric!r} is not a dotted name such as overall.velocity_rms_mm_s",
                       field="metric")
    pairs = [(ts, _json_path(upgrade_result_dict(json.loads(d)), metric))
             for ts, d in s.execute(select(Result.measured_ts, Result.data).where(*scope)
                                    .order_by(Result.measured_ts))]
    pairs = [(ts, v) for ts, v in pairs if v is not None]
    if len(pairs) <= max_points:
        return _raw(metric, pairs)
    t = np.array([p[0] for p in pairs])
    v = np.array([p[1] for p in pairs], dtype=float)
    k = ((t - a) / bucket_width(a, b, max_points)).astype(int)
    starts = np.flatnonzero(np.r_[True, k[1:] != k[:-1]])
    out = [(t[i], t[j - 1], v[i:j].min(), v[i:j].max(), v[i:j].mean(), j - i)
           for i, j in zip(starts, np.r_[starts[1:], t.size], strict=True)]
    return _buckets(metric, out, len(pairs))


def bucket_width(a: float, b: float, n: int) -> float:
    """Seconds per trend bucket; slightly wider than (b - a) / n so t1 itself falls in the last bucket."""
    return (b - a) * (1 + 1e-9) / n


def time_bucket(dialect: str, a: float, b: float, n: int):
    """The SQL bucket number 0..n-1 of ``results.measured_ts`` in [a, b] (the one bucketing rule of
    every chart query; :func:`bucket_width` per bucket, labelled ``k``)."""
    pos = (Result.measured_ts - a) / bucket_width(a, b, n)
    return (func.floor(pos) if dialect == "postgresql" else cast(pos, Integer)).label("k")


def _ts_iso(ts: float) -> str:
    return iso(dt.datetime.fromtimestamp(float(ts), dt.UTC))


def _raw(metric: str, rows) -> dict:
    return {"ok": True, "metric": metric, "bucketed": False, "n_source": len(rows),
            "t": [_ts_iso(r[0]) for r in rows], "value": [float(r[1]) for r in rows]}


def _buckets(metric: str, rows, n_source: int) -> dict:
    return {"ok": True, "metric": metric, "bucketed": True, "n_source": int(n_source),
            "t": [_ts_iso((r[0] + r[1]) / 2) for r in rows], "t_first": [_ts_iso(r[0]) for r in rows],
            "t_last": [_ts_iso(r[1]) for r in rows], "min": [float(r[2]) for r in rows],
            "max": [float(r[3]) for r in rows], "mean": [float(r[4]) for r in rows],
            "count": [int(r[5]) for r in rows]}


def waterfall(s, point_id: int, n: int) -> dict:
    rows = s.execute(
        select(Result, Record.measured_at, Record.speed_hz).join(Record, Record.id == Result.record_id)
        .where(Result.point_id == point_id, Result.current)
        .order_by(Result.measured_ts.desc()).limit(n)
    ).all()
    spectra = []
    for res, measured_at, speed in reversed(rows):
        meta, arrays = unpack_arrays(res.spectrum)
        spectra.append({"record_id": res.record_id, "measured_at": iso(measured_at), "speed_hz": speed,
                        "forcing_hz": res.forcing_hz, "freqs_hz": arrays["freqs_hz"].tolist(),
                        "amplitude": arrays["amplitude"].tolist(), "units": meta.get("units"),
                        "amplitude_measure": SPECTRUM_MEASURES["amplitude_measure"]})
    return {"ok": True, "point_id": point_id, "spectra": spectra}
