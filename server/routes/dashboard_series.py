"""Read-side queries behind the dashboard charts (no router here; see server/routes/dashboard.py).

* :func:`point_series`: several result metrics of one point over a period, bucketed in SQL to at most
  ``max_points`` buckets (min, max and mean of each), so a year of hourly readings stays one small answer.
  ``precursor_rate`` is the narrow decay rate γ− of the 0.5X precursor bump (absent without a precursor).
* :func:`asset_sparks`: a small half-order trend per asset for the plant overview (max per bucket).
* :func:`trend_forecast`: the trend fit of the half-order velocity and its forecast to the danger level,
  from :func:`analysis.trend.fit_trend`, with the forecast line and its 90 % crossing interval.
"""

from __future__ import annotations

import datetime as dt
import functools
import math

from sqlalchemy import Float, Integer, Text, cast, func, literal, select

from server.storage.queries import iso
from server.storage.tables import Point, Result

#: series name -> (label, unit) as the charts show them
SERIES = {
    "half_velocity": ("half-order velocity", "mm/s"),
    "one_x_velocity": ("1X velocity", "mm/s"),
    "ratio": ("half-order / 1X amplitude", "ratio"),
    "overall": ("overall velocity r.m.s.", "mm/s"),
    "growth": ("within-record growth rate", "1/s"),
    "forcing": ("forcing frequency (1X)", "Hz"),
    "precursor_rate": ("0.5X precursor narrow decay rate", "1/s"),
}


def json_number(dialect: str, *path: str):
    """A number inside the result JSON (``data``), read in SQL."""
    if dialect == "postgresql":
        from sqlalchemy.dialects.postgresql import JSONB, array

        arr = array([literal(p, Text) for p in path], type_=Text)  # bound parameters, never SQL text
        return cast(cast(Result.data, JSONB).op("#>>")(arr), Float)
    return func.json_extract(Result.data, "$." + ".".join(f'"{p}"' for p in path))


def _columns(dialect: str) -> dict:
    one_x_amp = json_number(dialect, "orders", "1X", "amplitude")
    return {
        "half_velocity": Result.sub_velocity_mm_s,
        "one_x_velocity": json_number(dialect, "orders", "1X", "velocity_mm_s"),
        "ratio": Result.sub_amplitude / func.nullif(one_x_amp, 0),
        "overall": Result.overall_velocity_rms_mm_s,
        "growth": Result.growth_rate_per_s,
        "forcing": Result.forcing_hz,
        # the noise-excited 0.5X bump below threshold: JSON null (no precursor) reads as SQL NULL
        "precursor_rate": json_number(dialect, "subharmonic", "precursor", "narrow_rate_per_s"),
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
    cols = _columns(dialect)
    scope = (Result.point_id == point_id, Result.current.is_(True), Result.measured_ts >= a,
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
    width = (b - a) * (1 + 1e-9) / max_points
    pos = (Result.measured_ts - a) / width
    bucket = (func.floor(pos) if dialect == "postgresql" else cast(pos, Integer)).label("k")
    # each row's values once (JSON parsed once per row), then min/max/mean per bucket
    inner = select(bucket, Result.measured_ts.label("ts"), cast(Result.sub_detected, Integer).label("det"),
                   *[cast(c, Float).label(n) for n, c in cols.items()]).where(*scope) \
        .cte("per_row").prefix_with("MATERIALIZED")
    aggregates = []
    for name in names:
        col = inner.c[name]
        aggregates += [func.min(col), func.max(col), func.avg(col)]
    rows = s.execute(select(inner.c.k, func.min(inner.c.ts), func.max(inner.c.ts), func.count(),
                            func.max(inner.c.det), *aggregates)
                     .group_by(inner.c.k).order_by(inner.c.k)).all()
    out = {"bucketed": True, "n_source": n, "t": [_ts((r[1] + r[2]) / 2) for r in rows],
           "count": [int(r[3]) for r in rows], "detected": [bool(r[4]) for r in rows]}
    for i, name in enumerate(names):
        j = 5 + 3 * i
        out[name] = {"min": [_num(r[j]) for r in rows], "max": [_num(r[j + 1]) for r in rows],
                     "mean": [_num(r[j + 2]) for r in rows]}
    return out


def asset_sparks(s, points: list[Point], *, days: float = 30.0, buckets: int = 30,
                 now: dt.datetime | None = None) -> dict[int, list[float | None]]:
    """Per asset: the largest half-order velocity of its points in each of ``buckets`` periods."""
    now = now or dt.datetime.now(dt.UTC)
    b = now.timestamp()
    a = b - days * 86400.0
    asset_of = {p.id: p.asset_id for p in points}
    if not asset_of:
        return {}
    width = (b - a) * (1 + 1e-9) / buckets
    pos = (Result.measured_ts - a) / width
    dialect = s.bind.dialect.name
    bucket = (func.floor(pos) if dialect == "postgresql" else cast(pos, Integer)).label("k")
    rows = s.execute(select(Result.point_id, bucket, func.max(Result.sub_velocity_mm_s))
                     .where(Result.point_id.in_(list(asset_of)), Result.current.is_(True),
                            Result.measured_ts >= a, Result.measured_ts <= b)
                     .group_by(Result.point_id, bucket)).all()
    out: dict[int, list[float | None]] = {}
    for pid, k, v in rows:
        series = out.setdefault(asset_of[pid], [None] * buckets)
        k = min(int(k), buckets - 1)
        if v is not None and (series[k] is None or v > series[k]):
            series[k] = float(v)
    return out


def _fit_input(data: dict, max_points: int) -> tuple[list[float], list[float], list[float]]:
    """(unix days, half-order velocity, forcing Hz) of the detected readings or buckets, thinned to at most
    ``max_points`` by geometric means of neighbours (the trend model is exponential)."""
    mean = data["half_velocity"]["mean"]
    forcing = data["forcing"]["mean"]
    rows = [(dt.datetime.fromisoformat(t.replace("Z", "+00:00")).timestamp() / 86400.0, v, f)
            for t, v, f, det in zip(data["t"], mean, forcing, data["detected"], strict=True)
            if det and v is not None and v > 0]
    step = max(1, -(-len(rows) // max_points))
    out = ([], [], [])
    for i in range(0, len(rows), step):
        chunk = rows[i:i + step]
        out[0].append(sum(r[0] for r in chunk) / len(chunk))
        out[1].append(math.exp(sum(math.log(r[1]) for r in chunk) / len(chunk)))
        fs = [r[2] for r in chunk if r[2] is not None]
        out[2].append(sum(fs) / len(fs) if fs else math.nan)
    return out


def trend_forecast(data: dict, limit: float | None, *, max_points: int = 60) -> dict:
    """Trend fit of the half-order velocity of a series (from :func:`point_series`) and its forecast to
    ``limit`` (mm/s). Long series are thinned to ``max_points`` so the fit stays quick; the same input
    gives the cached answer."""
    days, amps, speeds = _fit_input(data, max_points)
    d = _fit(tuple(days), tuple(amps), tuple(speeds), limit)
    if d is None:
        return {"status": "unavailable", "message": "the trend fit is not installed"}
    out = {k: d.get(k) for k in ("status", "message", "model", "n_used", "n_total", "growth_db_per_day",
                                 "growth_db_per_day_lo", "growth_db_per_day_hi", "doubling_days",
                                 "days_to_limit", "days_to_limit_lo", "days_to_limit_hi", "limit",
                                 "onset_iso", "limit_iso")}
    out["thinned"] = len(days) < sum(1 for x in data["detected"] if x)
    band = d.get("band") or {}
    if band.get("days"):
        out["band"] = {"t": [_ts(x * 86400.0) for x in band["days"]], "fit": band["fit"], "lo": band["lo"],
                       "hi": band["hi"]}
        out["forecast"] = _forecast_line(d, band)
    return out


@functools.lru_cache(maxsize=256)
def _fit(days: tuple, amps: tuple, speeds: tuple, limit: float | None) -> dict | None:
    try:
        from analysis.trend import fit_trend
    except ImportError:  # the trend module is part of the analysis package; guard for partial installs
        return None
    fit = fit_trend(days, amps, limit=limit, speed_hz=speeds if any(map(math.isfinite, speeds)) else None)
    return fit.to_dict()


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
            "cross": _ts((last_day + days_to) * 86400.0),
            "cross_lo": None if lo is None else _ts((last_day + lo) * 86400.0),
            "cross_hi": None if hi is None else _ts((last_day + hi) * 86400.0),
            "from": _ts(last_day * 86400.0), "from_value": last_fit}
