"""Read-side queries behind the dashboard charts (no HTTP here; see server/routes/dashboard.py).

Every series names its measure: line velocities are r.m.s. in mm/s (peak / sqrt 2, the measure the
alarm rules and the ISO zones compare), accelerations are peaks in record units.

* :func:`point_series`: several result metrics of one point over a period, bucketed in SQL to at most
  ``max_points`` buckets (min, max and mean of each), so a year of hourly readings stays one small answer.
  All of them are typed columns of ``results`` (no JSON is parsed).
* :func:`asset_sparks`: a small half-order trend (velocity r.m.s.) per asset for the plant overview.
* :func:`trend_forecast`: the trend fit of the half-order velocity r.m.s. and its forecast to the danger
  level, from the alarm rules' own 6-hour trend buckets and :func:`server.alarms.checks.detailed_forecast`,
  so the chart and the alarm email give the same date.
"""

from __future__ import annotations

import datetime as dt
import math

from sqlalchemy import Float, Integer, cast, func, select

from server.alarms import checks
from server.storage.queries import iso, time_bucket
from server.storage.tables import Point, Result

#: series name -> (label, unit with its measure) as the charts show them
SERIES = {
    "half_order_velocity_rms_mm_s": ("half-order velocity r.m.s.", "mm/s r.m.s."),
    "one_x_velocity_rms_mm_s": ("1X velocity r.m.s.", "mm/s r.m.s."),
    "half_order_to_1x_ratio": ("half-order / 1X amplitude (peak / peak)", "ratio"),
    "overall_velocity_rms_mm_s": ("overall velocity r.m.s.", "mm/s r.m.s."),
    "growth_rate_per_s": ("within-record growth rate", "1/s"),
    "forcing_hz": ("forcing frequency (1X)", "Hz"),
    "precursor_rate_per_s": ("0.5X precursor narrow decay rate", "1/s"),
}


def _columns() -> dict:
    return {
        "half_order_velocity_rms_mm_s": Result.sub_velocity_rms_mm_s,
        "one_x_velocity_rms_mm_s": Result.one_x_velocity_rms_mm_s,
        "half_order_to_1x_ratio": Result.sub_accel_peak / func.nullif(Result.one_x_accel_peak, 0),
        "overall_velocity_rms_mm_s": Result.overall_velocity_rms_mm_s,
        "growth_rate_per_s": Result.growth_rate_per_s,
        "forcing_hz": Result.forcing_hz,
        # the noise-excited 0.5X bump below threshold: NULL without a precursor
        "precursor_rate_per_s": Result.precursor_rate_per_s,
    }


def _ts(x: float | None) -> str | None:
    return None if x is None else iso(dt.datetime.fromtimestamp(float(x), dt.UTC))


def _num(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def point_series(s, point_id: int, t0: dt.datetime, t1: dt.datetime, max_points: int) -> dict:
    a, b = t0.timestamp(), t1.timestamp()
    dialect = s.bind.dialect.name
    cols = _columns()
    scope = (Result.point_id == point_id, Result.current, Result.measured_ts >= a,
             Result.measured_ts <= b)
    n = s.scalar(select(func.count()).where(*scope)) or 0
    names = list(cols)
    if n <= max_points:
        rows = s.execute(select(Result.measured_ts, Result.sub_detected, Result.record_id, *cols.values())
                         .where(*scope).order_by(Result.measured_ts)).all()
        out = {"bucketed": False, "n_source": n, "t": [_ts(r[0]) for r in rows],
               "detected": [bool(r[1]) for r in rows], "record_id": [r[2] for r in rows]}
        for i, name in enumerate(names):
            out[name] = {"mean": [_num(r[3 + i]) for r in rows]}
        return out
    bucket = time_bucket(dialect, a, b, max_points)
    aggregates = []
    for col in cols.values():
        col = cast(col, Float)
        aggregates += [func.min(col), func.max(col), func.avg(col)]
    rows = s.execute(select(bucket, func.min(Result.measured_ts), func.max(Result.measured_ts), func.count(),
                            func.max(cast(Result.sub_detected, Integer)), *aggregates)
                     .where(*scope).group_by(bucket).order_by(bucket)).all()
    out = {"bucketed": True, "n_source": n, "t": [_ts((r[1] + r[2]) / 2) for r in rows],
           "count": [int(r[3]) for r in rows], "detected": [bool(r[4]) for r in rows]}
    for i, name in enumerate(names):
        j = 5 + 3 * i
        out[name] = {"min": [_num(r[j]) for r in rows], "max": [_num(r[j + 1]) for r in rows],
                     "mean": [_num(r[j + 2]) for r in rows]}
    return out


def asset_sparks(s, points: list[Point], *, days: float = 30.0, buckets: int = 30,
                 now: dt.datetime | None = None) -> dict[int, list[float | None]]:
    """Per asset: the largest half-order velocity r.m.s. (mm/s) of its points in each of ``buckets``
    periods."""
    now = now or dt.datetime.now(dt.UTC)
    b = now.timestamp()
    a = b - days * 86400.0
    asset_of = {p.id: p.asset_id for p in points}
    if not asset_of:
        return {}
    bucket = time_bucket(s.bind.dialect.name, a, b, buckets)
    rows = s.execute(select(Result.point_id, bucket, func.max(Result.sub_velocity_rms_mm_s))
                     .where(Result.point_id.in_(list(asset_of)), Result.current,
                            Result.measured_ts >= a, Result.measured_ts <= b)
                     .group_by(Result.point_id, bucket)).all()
    out: dict[int, list[float | None]] = {}
    for pid, k, v in rows:
        series = out.setdefault(asset_of[pid], [None] * buckets)
        k = min(int(k), buckets - 1)
        if v is not None and (series[k] is None or v > series[k]):
            series[k] = float(v)
    return out


def trend_readings(s, point_id: int, end_ts: float) -> list[tuple[float, float]]:
    """``(epoch_s, half-order velocity r.m.s. or 0)`` of the readings in the newest
    ``checks.BUCKETS_KEPT`` trend buckets up to ``end_ts``: the history the alarm rules fit.

    The rules also leave out readings they judged a data-quality problem (sensor faults, off-speed);
    those are rare and are kept here, so on such a point the two can differ slightly."""
    width = checks.BUCKET_S
    scope = (Result.point_id == point_id, Result.current, Result.measured_ts <= end_ts)
    start = func.floor(Result.measured_ts / width) if s.bind.dialect.name == "postgresql" \
        else cast(Result.measured_ts / width, Integer)
    newest = select(start.label("b")).where(*scope).group_by(start).order_by(start.desc()) \
        .limit(checks.BUCKETS_KEPT).subquery()
    first = s.scalar(select(func.min(newest.c.b)))
    if first is None:
        return []
    rows = s.execute(select(Result.measured_ts, Result.sub_detected, Result.sub_velocity_rms_mm_s)
                     .where(*scope, Result.measured_ts >= float(first) * width)
                     .order_by(Result.measured_ts)).all()
    return [(float(ts), float(v) if det and v is not None else 0.0) for ts, det, v in rows]


def trend_forecast(readings: list[tuple[float, float]], limit: float | None) -> dict:
    """Trend fit of the half-order velocity r.m.s. and its forecast to ``limit`` (mm/s r.m.s.), from the
    alarm rules' trend buckets of ``readings`` (:func:`trend_readings`) and the alarm emails' model."""
    history = checks.trend_history(checks.buckets_of(readings))
    d = checks.detailed_forecast(history, limit=limit, band_points=60)
    out = {k: d.get(k) for k in ("status", "message", "model", "n_used", "n_total", "growth_db_per_day",
                                 "growth_db_per_day_lo", "growth_db_per_day_hi", "doubling_days",
                                 "days_to_limit", "days_to_limit_lo", "days_to_limit_hi", "onset_iso",
                                 "limit_iso")}
    out["limit_rms_mm_s"] = d.get("limit", limit)
    out["input"] = (f"{len(history)} six-hour buckets (geometric mean of the half-order velocity r.m.s.), "
                    "as the alarm rules and emails use")
    band = d.get("band") or {}
    if band.get("days"):
        out["band"] = {"t": [_ts(x * 86400.0) for x in band["days"]], "fit": band["fit"], "lo": band["lo"],
                       "hi": band["hi"]}
        out["forecast"] = _forecast_line(d, band)
    return out


def _forecast_line(d: dict, band: dict) -> dict | None:
    """From the last fitted value to the limit: the mean line and the 90 % interval of the crossing."""
    days_to = d.get("days_to_limit")
    limit = d.get("limit")
    if d.get("status") != "forecast" or days_to is None or limit is None:
        return None
    last_day, last_fit = band["days"][-1], band["fit"][-1]
    rate, slope = d.get("growth_per_day"), d.get("slope_per_day")
    grid = [last_day + days_to * i / 20.0 for i in range(21)]
    if rate is not None:
        line = [last_fit * math.exp(rate * (x - last_day)) for x in grid]
    elif slope is not None:
        line = [last_fit + slope * (x - last_day) for x in grid]
    else:
        return None
    lo, hi = d.get("days_to_limit_lo"), d.get("days_to_limit_hi")
    return {"t": [_ts(x * 86400.0) for x in grid], "value": line,
            "cross": _ts((d.get("last_day") or last_day) * 86400.0 + days_to * 86400.0),
            "cross_lo": None if lo is None else _ts((last_day + lo) * 86400.0),
            "cross_hi": None if hi is None else _ts((last_day + hi) * 86400.0),
            "from": _ts(last_day * 86400.0), "from_value": last_fit}
