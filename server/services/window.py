"""The operating window of a point: its readings in (forcing frequency, 1X acceleration peak), the
fitted instability region from :mod:`analysis.window` when the data constrain it, and the plain
conclusion (:func:`analysis.window.conclusion`, the one home of its wording).

The fit uses the labels (half-order line present or not) and the reading times (one day = one cluster of
dependent readings). It is not given the within-record growth rates: on a line that has reached its
limit cycle they read about 0 1/s, and on the demo's restarts they came out 3-5 times below the
linear-stage rate of the invented mode, so they pinned f0 far from it with a falsely small interval
(docs/window.md).

Used by the dashboard (``GET /api/v1/dashboard/points/{id}/window``) and by the alarm margin rule
(:mod:`server.alarms.margin`), so both read the same rows and the same fit. The threshold a_c(f) itself
is :func:`analysis.window.threshold_amplitude`; this module only shapes the fit for the chart (region
outline, unstable band at today's amplitude, margin) and says plainly when there is none.
"""

from __future__ import annotations

import datetime as dt
import math

from sqlalchemy import select

from analysis.physics.window import conclusion, fit_operating_window, threshold_amplitude
from server.storage.queries import iso
from server.storage.tables import Result

NO_FIT = "no operating-window fit is available for this point yet"


def _f(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


ROW_COLUMNS = (Result.measured_ts, Result.forcing_hz, Result.one_x_accel_peak, Result.sub_detected,
               Result.sub_class, Result.growth_rate_per_s, Result.sub_accel_peak, Result.record_id)


def history_rows(s, point_id: int, *, start_ts: float | None = None, end_ts: float | None = None,
                 limit: int = 2000) -> list:
    """The newest ``limit`` current results of a point (typed columns, oldest first) for the window fit."""
    where = [Result.point_id == point_id, Result.current]
    if start_ts is not None:
        where.append(Result.measured_ts >= start_ts)
    if end_ts is not None:
        where.append(Result.measured_ts <= end_ts)
    rows = s.execute(select(*ROW_COLUMNS).where(*where).order_by(Result.measured_ts.desc())
                     .limit(limit)).all()
    rows.reverse()
    return rows


def readings(rows) -> list[dict]:
    """Rows of :data:`ROW_COLUMNS` as chart points (acceleration peaks in record units)."""
    out = []
    for ts, f, a1, det, klass, growth, sub_a, rid in rows:
        f, a1 = _f(f), _f(a1)
        if f is None or a1 is None:
            continue
        half = bool(det) and klass == "half-order"
        out.append({"t": iso(dt.datetime.fromtimestamp(ts, dt.UTC)), "forcing_hz": f, "one_x_accel_peak": a1,
                    "present": half, "class": klass if det else "none", "growth_per_s": _f(growth),
                    "half_order_accel_peak": _f(sub_a), "record_id": rid})
    return out


def region(fit: dict, speeds: list[float], *, points: int = 121) -> dict | None:
    """The fitted tongue boundary: the 1X acceleration-peak threshold a_c(f) over a speed grid."""
    f0, zeta, k = _f(fit.get("f0_hz")), _f(fit.get("zeta")), _f(fit.get("k_per_unit"))
    if f0 is None or zeta is None or k is None or not (f0 > 0 and zeta > 0 and k > 0):
        return None
    lo = min([*speeds, 2 * f0 * 0.85])
    hi = max([*speeds, 2 * f0 * 1.15])
    grid = [lo + (hi - lo) * i / (points - 1) for i in range(points)]
    amp = [float(v) for v in threshold_amplitude(grid, f0, zeta, k)]
    return {"forcing_hz": grid, "one_x_accel_peak": amp}


def fitted_window(pts: list[dict]) -> dict:
    today = pts[-1]
    speeds = [p["forcing_hz"] for p in pts]
    try:
        present = [1.0 if p["present"] else 0.0 for p in pts]
        result = fit_operating_window(speeds, [p["one_x_accel_peak"] for p in pts], present,
                                      time_s=[dt.datetime.fromisoformat(p["t"]).timestamp() for p in pts],
                                      today_speed_hz=today["forcing_hz"],
                                      today_amp_1x=today["one_x_accel_peak"])
    except ValueError as exc:
        return {"status": "not_constrained", "message": f"the fit could not be made: {exc}"}
    d = result.to_dict()
    d["region"] = region(d, speeds)
    if d.get("margin_pct_lo") is not None and d.get("margin_pct_hi") is not None:
        d["margin_ci"] = [d["margin_pct_lo"], d["margin_pct_hi"]]
    return d


def window_answer(rows, *, units: str = "g", forcing_per_rev: float = 1.0) -> dict:
    """Readings, today's point, the fit and the plain conclusion at today's 1X amplitude."""
    pts = readings(rows)
    today = pts[-1] if pts else None
    fit = fitted_window(pts) if len(pts) >= 2 else {"status": "not_enough_data",
                                                      "message": "fewer than two readings with 1X"}
    said = conclusion(fit, today["one_x_accel_peak"] if today else math.nan,
                      today["forcing_hz"] if today else math.nan, [p["forcing_hz"] for p in pts],
                      forcing_per_rev=forcing_per_rev or 1.0, units=units)
    return {"readings": pts, "today": today, "fit": fit, "conclusion": said.to_dict()}
