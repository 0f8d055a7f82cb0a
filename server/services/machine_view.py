"""What the machine page adds to the chart series: speed changes, the default period, recent readings.

* :func:`speed_changes`: steps in a point's shaft speed. A step is a change of more than
  ``SPEED_STEP`` (relative) between the median speed of the ``SPEED_RUN`` readings before and after it,
  each run steady within half that step, so a drive that swings smoothly with the day (or a machine
  whose speed differs from one reading to the next) is not marked at every reading.
* :func:`default_period`: the shortest period offered on the page (30, 90 or 365 days) that shows the
  last change of alarm level or of speed with some history before it; 90 days when there is none.
* :func:`recent_readings`: the newest readings of a point with their result columns (each names its
  measure and unit).

Pure reads (the caller checks the site of the point).
"""

from __future__ import annotations

import datetime as dt
import statistics

from sqlalchemy import select

from server.services.reading_view import zone_graded
from server.storage.queries import iso
from server.storage.tables import Point, Record, Result

#: house choice: 2 % of shaft speed is a deliberate change (a drive setpoint, a pulley), well above the
#: speed jitter of a fixed-speed motor (slip varies with load by a fraction of a percent: common practice)
SPEED_STEP = 0.02
SPEED_RUN = 3
PERIOD_CHOICES_DAYS = (30, 90, 365)
NO_CHANGE_DAYS = 90
#: show this share of the period before the change itself, so the chart has "before" to compare with
CONTEXT_SHARE = 0.15


def _aware(t: dt.datetime) -> dt.datetime:
    return t if t.tzinfo is not None else t.replace(tzinfo=dt.UTC)


def find_steps(times: list[dt.datetime], speeds: list[float]) -> list[dict]:
    """Steps in ``speeds`` (shaft speed, Hz) measured at ``times`` (oldest first)."""
    out: list[dict] = []
    n = len(speeds)
    i = SPEED_RUN
    while i <= n - 2:
        before = speeds[i - SPEED_RUN:i]
        after = speeds[i:i + SPEED_RUN]
        mb, ma = statistics.median(before), statistics.median(after)
        steady = all((max(w) - min(w)) <= 0.5 * SPEED_STEP * statistics.median(w) for w in (before, after))
        if mb > 0 and steady and abs(ma - mb) > SPEED_STEP * mb:
            out.append({"t": iso(times[i]), "from_hz": mb, "to_hz": ma,
                        "change_pct": 100.0 * (ma - mb) / mb})
            i += SPEED_RUN
            continue
        i += 1
    return out


def _speed_rows(s, point_id: int, t0: dt.datetime, t1: dt.datetime):
    point = s.get(Point, point_id)
    mult = (point.asset.forcing_multiplier or 1.0) if point is not None else 1.0
    rows = s.execute(select(Record.measured_at, Record.speed_hz, Result.forcing_hz)
                     .outerjoin(Result, (Result.record_id == Record.id) & Result.current)
                     .where(Record.point_id == point_id, Record.measured_at >= t0, Record.measured_at <= t1)
                     .order_by(Record.measured_at)).all()
    times, speeds = [], []
    for t, speed, forcing in rows:
        v = speed if speed else (forcing / mult if forcing else None)
        if v:
            times.append(_aware(t))
            speeds.append(float(v))
    return times, speeds


def speed_changes(s, point_id: int, t0: dt.datetime, t1: dt.datetime) -> list[dict]:
    """Speed steps of a point between ``t0`` and ``t1`` (a run of readings before ``t0`` is read too, so
    a step early in the period is found)."""
    times, speeds = _speed_rows(s, point_id, t0 - dt.timedelta(days=30), t1)
    return [c for c in find_steps(times, speeds) if t0 <= dt.datetime.fromisoformat(c["t"]) <= t1]


def last_level_change(s, point_id: int) -> dt.datetime | None:
    from server.alarms.tables import AlarmEvent

    t = s.scalar(select(AlarmEvent.created_at).where(AlarmEvent.point_id == point_id,
                                                      AlarmEvent.kind == "transition")
                 .order_by(AlarmEvent.created_at.desc()).limit(1))
    return None if t is None else _aware(t)


def default_period(s, point_id: int, now: dt.datetime | None = None) -> dict:
    """``{"days", "reason", "speed_change_at", "level_change_at"}``: the page's default period."""
    now = now or dt.datetime.now(dt.UTC)
    horizon = now - dt.timedelta(days=max(PERIOD_CHOICES_DAYS))
    times, speeds = _speed_rows(s, point_id, horizon, now)
    steps = find_steps(times, speeds)
    speed_at = dt.datetime.fromisoformat(steps[-1]["t"]) if steps else None
    level_at = last_level_change(s, point_id)
    if level_at is not None and level_at < horizon:
        level_at = None
    changes = [t for t in (speed_at, level_at) if t is not None]
    if not changes:
        return {"days": NO_CHANGE_DAYS, "speed_change_at": None, "level_change_at": None,
                "reason": f"no change of alarm level or speed in the last {max(PERIOD_CHOICES_DAYS)} days"}
    age_days = (now - min(changes)).total_seconds() / 86400.0
    days = next((d for d in PERIOD_CHOICES_DAYS if age_days <= d * (1.0 - CONTEXT_SHARE)),
                max(PERIOD_CHOICES_DAYS))
    said = []
    if speed_at is not None:
        said.append(f"the last speed change ({steps[-1]['from_hz']:.2f} → {steps[-1]['to_hz']:.2f} Hz)")
    if level_at is not None:
        said.append("the last change of alarm level")
    return {"days": days, "speed_change_at": iso(speed_at) if speed_at else None,
            "level_change_at": iso(level_at) if level_at else None,
            "reason": "includes " + " and ".join(said)}


def recent_readings(s, point_id: int, limit: int) -> list[dict]:
    """The newest readings with their current result (``None`` fields while a reading is not analysed)."""
    rows = s.execute(select(Record, Result)
                     .outerjoin(Result, (Result.record_id == Record.id) & Result.current)
                     .where(Record.point_id == point_id)
                     .order_by(Record.measured_at.desc()).limit(limit)).all()
    out = []
    for rec, res in rows:
        graded = res is not None and zone_graded(res.forcing_hz, rec.fs_hz)
        out.append({"record_id": rec.id, "measured_at": iso(rec.measured_at), "speed_hz": rec.speed_hz,
                    "origin": rec.origin, "n_samples": rec.n_samples, "fs_hz": rec.fs_hz,
                    "analysed": res is not None,
                    "half_order_detected": None if res is None else bool(res.sub_detected),
                    "half_order_class": None if res is None else res.sub_class,
                    "half_order_velocity_rms_mm_s": None if res is None else res.sub_velocity_rms_mm_s,
                    "overall_velocity_rms_mm_s": None if res is None else res.overall_velocity_rms_mm_s,
                    "zone": None if res is None or not graded else res.zone,
                    "zone_graded": graded,
                    "growth_rate_per_s": None if res is None else res.growth_rate_per_s})
    return out
