"""Pure checks run before and beside the rules: data quality, speed, trend across records.

* :func:`data_quality_problem` says why a record must not be judged as machine behaviour (sensor or
  cable fault flags from the analysis, or a speed unlike the point's usual or the asset's nominal).
* :func:`trend_and_forecast` fits ln(amplitude) against time in days with Theil-Sen (robust to a
  stray reading) and forecasts the time to a limit: dB/day = 20 / ln(10) x slope.
* The alarm rules read the trend from :func:`trend_history` (readings pooled into 6-hour buckets, the
  geometric mean of each, see :func:`add_to_buckets`) with ``conservative=True``: the trend is the
  lower bound of the slope's 90 % interval (Sen's interval from Kendall's tau, as
  ``scipy.stats.theilslopes``) and the time to the limit is the one that lower slope gives (the upper
  bound of the time). A steady line with scatter therefore neither raises nor flaps; a real rise does.
"""

from __future__ import annotations

import functools
import math
import statistics

import numpy as np

from analysis.physics.trend import DB_PER_NEPER

# Flags of the measurement chain that make a record unfit for machine alarms. A record the analysis
# marks not ok is unfit too, unless its only flags are notes such as "too-short-for-resolution".
BLOCKING_FLAGS = ("flat-line", "clipping", "dc-jump", "impulsive")
NOTE_FLAGS = ("too-short-for-resolution",)
FLAG_WORDS = {
    "flat-line": "flat line (sensor or cable fault)",
    "clipping": "clipping (input range exceeded)",
    "dc-jump": "DC offset jump (sensor bias fault)",
    "impulsive": "excessive kurtosis from impacts (cable or connector)",
}
NO_FORECAST_DAYS = 9999.0  # "not growing": reads as far beyond any time-to-limit level
SPEED_HISTORY = 20
MIN_USUAL_SPEEDS = 3
# Trend buckets (house choice): readings pooled per 6 h, the newest 40 buckets (10 days at an hourly
# rate, 40 readings of a monthly route). A fit for the rules needs 6 buckets spanning at least 3 days.
BUCKET_S = 6 * 3600.0
BUCKETS_KEPT = 40
RULE_MIN_POINTS = 6
RULE_MIN_SPAN_DAYS = 3.0
TREND_CONFIDENCE = 0.90  # two-sided; its lower end is a one-sided 95 % bound
_Z = {0.90: 1.6448536269514722, 0.95: 1.959963984540054}  # standard normal quantiles (scipy.stats.norm)


def data_quality_problem(
    result,
    *,
    usual_speeds_hz: list[float],
    nominal_forcing_hz: float | None,
    speed_tolerance: float = 0.10,
    nominal_tolerance: float = 0.25,
) -> str | None:
    """A sentence saying why the record is a data-quality problem, or ``None`` when it is fit.

    ``result`` is the typed result or a stored dict of any version (read through its attributes)."""
    from .rules import typed_result

    r = typed_result(result)
    flags = [str(f) for f in r.quality.flags]
    bad = [f for f in flags if f in BLOCKING_FLAGS]
    if bad:
        return "bad data: " + ", ".join(FLAG_WORDS.get(f, f) for f in bad)
    if r.quality.ok is False and (not flags or any(f not in NOTE_FLAGS for f in flags)):
        return "bad data: " + (", ".join(flags) or "the analysis marked the record unfit")
    speed = r.forcing.frequency_hz
    if not isinstance(speed, (int, float)) or not math.isfinite(speed) or speed <= 0:
        return None
    if len(usual_speeds_hz) >= MIN_USUAL_SPEEDS:
        usual = statistics.median(usual_speeds_hz)
        if usual > 0 and abs(speed - usual) > speed_tolerance * usual:
            return (
                f"different speed: forcing {speed:.2f} Hz against the point's usual {usual:.2f} Hz "
                f"(tolerance {speed_tolerance:.0%})"
            )
    if nominal_forcing_hz and nominal_forcing_hz > 0:
        if abs(speed - nominal_forcing_hz) > nominal_tolerance * nominal_forcing_hz:
            return (
                f"different speed: forcing {speed:.2f} Hz against the asset's nominal "
                f"{nominal_forcing_hz:.2f} Hz (tolerance {nominal_tolerance:.0%})"
            )
    return None


def remember_speed(speeds: list[float], speed_hz) -> list[float]:
    if isinstance(speed_hz, (int, float)) and math.isfinite(speed_hz) and speed_hz > 0:
        speeds = [*speeds, float(speed_hz)]
    return speeds[-SPEED_HISTORY:]


@functools.lru_cache(maxsize=64)
def _pairs(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs (i < j) of n readings; the history is at most 30 long, so the few sizes are cached."""
    i, j = np.triu_indices(n, k=1)
    i.flags.writeable = j.flags.writeable = False
    return i, j


def theil_sen(x: list[float], y: list[float]) -> tuple[float, float]:
    """Theil-Sen line: slope = median of pairwise slopes, intercept = median(y) - slope * median(x).

    The same estimator as ``scipy.stats.theilslopes`` (checked against it in the tests), written
    out with numpy because the worker runs it for every record (the medians of the at most 30
    readings are taken in plain Python, cheaper than numpy's for so few values).
    """
    xs, ys = [float(v) for v in x], [float(v) for v in y]
    xa, ya = np.array(xs), np.array(ys)
    i, j = _pairs(xa.size)
    dx = xa[j] - xa[i]
    keep = dx != 0
    slope = float(np.median((ya[j] - ya[i])[keep] / dx[keep]))
    return slope, statistics.median(ys) - slope * statistics.median(xs)


def theil_sen_interval(x: list[float], y: list[float],
                       confidence: float = TREND_CONFIDENCE) -> tuple[float, float]:
    """Sen's confidence interval of the Theil-Sen slope (the one of ``scipy.stats.theilslopes``).

    The order statistics of the pairwise slopes at ``(N -/+ z sigma) / 2`` with N the number of
    slopes and sigma the standard deviation of Kendall's S, corrected for ties in x (Sen 1968).
    """
    xa, ya = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    i, j = _pairs(xa.size)
    dx = xa[j] - xa[i]
    keep = dx != 0
    slopes = np.sort((ya[j] - ya[i])[keep] / dx[keep])
    n = xa.size
    _, counts = np.unique(xa, return_counts=True)
    ties = float(np.sum(counts * (counts - 1) * (2 * counts + 5)))
    sigma = math.sqrt((n * (n - 1) * (2 * n + 5) - ties) / 18.0)
    z = _Z.get(confidence)
    if z is None:
        from scipy.stats import norm

        z = float(norm.ppf(0.5 + confidence / 2.0))
    upper = min(int(round((slopes.size + z * sigma) / 2.0)), slopes.size - 1)
    lower = max(int(round((slopes.size - z * sigma) / 2.0)) - 1, 0)
    return float(slopes[lower]), float(slopes[upper])


def add_to_buckets(buckets: list[list[float]], ts: float, amplitude: float, *,
                   width_s: float = BUCKET_S, kept: int = BUCKETS_KEPT) -> list[list[float]]:
    """Pool one reading into its time bucket ``[start_s, n_all, n_line, sum_t, sum_ln]`` (time order kept).

    Only the sums are stored, so a bucket costs five numbers whatever the reading rate.
    """
    start = math.floor(ts / width_s) * width_s
    out = [list(b) for b in buckets]
    for b in out:
        if b[0] == start:
            break
    else:
        b = [start, 0, 0, 0.0, 0.0]
        out = sorted([*out, b], key=lambda item: item[0])
    b[1] += 1
    if amplitude and amplitude > 0:
        b[2] += 1
        b[3] += ts
        b[4] += math.log(amplitude)
    return out[-kept:]


def trend_history(buckets: list[list[float]]) -> list[list[float]]:
    """``[[epoch_s, amplitude], ...]`` of the buckets: the geometric mean of a bucket's lines at their
    mean time, or 0 (no line) when fewer than half of its readings had one."""
    out = []
    for start, n_all, n_line, sum_t, sum_ln in buckets:
        if n_line and 2 * n_line >= n_all:
            out.append([sum_t / n_line, math.exp(sum_ln / n_line)])
        else:
            out.append([start + BUCKET_S / 2, 0.0])
    return out


def trend_and_forecast(
    history: list[list[float]],
    *,
    limit: float | None,
    min_points: int = 4,
    min_span_days: float = 1.0 / 24.0,
    conservative: bool = False,
) -> tuple[float | None, float | None]:
    """``(dB/day, days to limit)`` from ``[[epoch_s, amplitude], ...]`` (oldest first).

    The fit uses the run of detected (positive) amplitudes that ends at the newest reading. When the
    newest reading has no half-order line the trend is 0 dB/day and there is no forecast. ``None``
    means too few readings to say anything. With ``conservative`` the slope is the lower end of its
    90 % interval (see :func:`theil_sen_interval`): the trend is the least growth the readings
    support, and the time to the limit the longest.
    """
    if not history:
        return None, None
    run: list[list[float]] = []
    for ts, amp in reversed(history):
        if not (amp and amp > 0):
            break
        run.append([ts, amp])
    if not run:
        return 0.0, NO_FORECAST_DAYS
    run.reverse()
    if len(run) < min_points:
        return None, None
    days = [(ts - run[0][0]) / 86400.0 for ts, _ in run]
    if days[-1] - days[0] < min_span_days:
        return None, None
    logs = [math.log(a) for _, a in run]
    slope, intercept = theil_sen(days, logs)
    now_log = intercept + slope * days[-1]  # the fitted level now (median line)
    if conservative:
        slope = theil_sen_interval(days, logs)[0]
    db_per_day = DB_PER_NEPER * float(slope)
    if limit is None or limit <= 0:
        return db_per_day, None
    if now_log >= math.log(limit):
        return db_per_day, 0.0
    if slope <= 0:
        return db_per_day, NO_FORECAST_DAYS
    return db_per_day, min(NO_FORECAST_DAYS, (math.log(limit) - now_log) / slope)


def detailed_forecast(history: list[list[float]], *, limit: float | None, band_points: int = 2) -> dict:
    """The one forecast planners read, in alarm emails and on the machine page's chart.

    ``history`` is the rule's trend history (:func:`trend_history` of the 6-hour buckets, r.m.s. mm/s);
    the model is :func:`analysis.trend.fit_trend` (model choice by AICc, change point, Fieller interval
    of the crossing) on its buckets with a line. Emails and charts call this with the same buckets, so
    they give the same date. It costs milliseconds, so the engine calls it only when a level changes.
    """
    from analysis.physics.trend import fit_trend

    points = [(ts / 86400.0, a) for ts, a in history if a and a > 0]
    if len(points) < 5:
        return {"status": "not_enough_data",
                "message": "fewer than five 6-hour buckets with a half-order line"}
    try:
        res = fit_trend([p[0] for p in points], [p[1] for p in points], limit=limit, band_points=band_points)
    except ValueError as exc:
        return {"status": "failed", "message": str(exc)}
    return res.to_dict()


EMAIL_FORECAST_KEYS = ("status", "message", "model", "growth_db_per_day", "days_to_limit", "days_to_limit_lo",
                       "days_to_limit_hi", "limit", "last_day", "limit_iso")


def buckets_of(readings) -> list[list[float]]:
    """The rule's trend buckets from ``(epoch_s, half-order velocity r.m.s. or 0)`` readings, oldest first
    (what :mod:`.evaluate` accumulates one reading at a time)."""
    buckets: list[list[float]] = []
    for ts, value in readings:
        buckets = add_to_buckets(buckets, float(ts), float(value or 0.0))
    return buckets
