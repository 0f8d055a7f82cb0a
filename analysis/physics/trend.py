"""Growth of the subharmonic amplitude across records, and the time until it reaches a limit.

Input: one measurement point's readings at irregular times (route data has gaps). Steps:

1. Like with like: only readings whose speed is within ``speed_tolerance`` of the latest reading's speed
   (h/h_c depends on speed, so readings at another speed are another experiment).
2. Single outliers: a Hampel filter on ln(amplitude) (median of the neighbours, robust scale from the
   first differences) flags isolated readings more than 5 robust standard deviations off.
3. Models, each with Gaussian errors on ln(amplitude) so their likelihoods compare directly:
   flat, exponential (ln A = c + r t), linear (A = c + b t; its likelihood on A is moved to the ln A scale
   with the Jacobian sum(ln A_i)), and exponential after a change point (ln A = c + r max(0, t - t_c),
   t_c scanned over the readings). Choice by AICc (Hurvich & Tsai 1989); BIC is reported too.
4. Time to the limit: where the fitted mean line reaches the limit, with Fieller's (1954) interval for
   the ratio (the inverse-regression interval of the mean line), 90 % two-sided. When the slope is not
   significantly positive the upper end is not bounded, and the forecast says so.

Times are in days (any origin; the CLI uses unix days). Amplitudes must be > 0 (zeros and NaN are gaps).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import stats

__all__ = ["TrendResult", "fieller_crossing", "fit_trend"]

DB_PER_NEPER = 20.0 / math.log(10.0)  # 8.6859 dB per unit of ln(amplitude)
MIN_POINTS = 5


@dataclass(frozen=True)
class TrendResult:
    """Trend facts of one series (see ``fit_trend``); ``to_dict`` gives the JSON of ``halfwatch trend``."""

    status: str
    message: str
    n_total: int
    n_used: int
    n_other_speed: int = 0
    n_outliers: int = 0
    n_gaps: int = 0
    model: str | None = None
    aicc: dict = field(default_factory=dict)
    bic: dict = field(default_factory=dict)
    growth_per_day: float | None = None
    growth_db_per_day: float | None = None
    growth_db_per_day_lo: float | None = None
    growth_db_per_day_hi: float | None = None
    doubling_days: float | None = None
    slope_per_day: float | None = None
    onset_day: float | None = None
    last_day: float | None = None
    last_value: float | None = None
    limit: float | None = None
    days_to_limit: float | None = None
    days_to_limit_lo: float | None = None
    days_to_limit_hi: float | None = None
    outlier_days: list = field(default_factory=list)
    band: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """JSON-ready dict; adds ISO dates for the onset and the limit when times are unix days."""
        d = asdict(self)
        d["onset_iso"] = _iso(self.onset_day)
        when = (
            None
            if self.days_to_limit is None or self.last_day is None
            else self.last_day + self.days_to_limit
        )
        d["limit_iso"] = _iso(when)
        return _clean(d)


def _iso(day: float | None) -> str | None:
    if day is None or not math.isfinite(day):
        return None
    return str(np.datetime64(int(round(day * 86400.0)), "s")) + "Z"


def _clean(obj):
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_clean(v) for v in obj.tolist()]
    if isinstance(obj, float | np.floating):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


def fieller_crossing(
    a: float, b: float, var_a: float, var_b: float, cov_ab: float, y0: float, t_crit: float
) -> tuple[float | None, float | None]:
    """Fieller confidence set for x0 = (y0 - a) / b on a fitted line y = a + b x.

    The set is {x : (y0 - a - b x)^2 <= t^2 Var(a + b x)}, a quadratic inequality A x^2 + B x + C <= 0.
    Returns (lo, hi); ``hi`` is None when the set is unbounded above (slope not significant), both None
    when it is empty or the whole line.
    """
    d = y0 - a
    qa = b * b - t_crit**2 * var_b
    qb = -2.0 * (d * b + t_crit**2 * cov_ab)
    qc = d * d - t_crit**2 * var_a
    disc = qb * qb - 4.0 * qa * qc
    if qa > 0 and disc >= 0:
        r = math.sqrt(disc)
        return (-qb - r) / (2.0 * qa), (-qb + r) / (2.0 * qa)
    if qa < 0 and disc > 0 and b > 0:
        # exterior of the roots: a bounded-below, unbounded-above piece on the side of positive slope
        r = math.sqrt(disc)
        roots = sorted(((-qb - r) / (2.0 * qa), (-qb + r) / (2.0 * qa)))
        return roots[1], None
    return None, None


@dataclass
class _Fit:
    name: str
    k: int
    loglik: float
    coef: np.ndarray
    cov: np.ndarray
    df: int
    onset: float | None = None


def _ols(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """OLS of y = c0 + c1 x: (coef, covariance with s^2 = SSE/(n-2), SSE)."""
    xm = x.mean()
    sxx = float(((x - xm) ** 2).sum())
    b = float(((x - xm) * (y - y.mean())).sum() / sxx)
    a = float(y.mean() - b * xm)
    sse = float(((y - a - b * x) ** 2).sum())
    s2 = sse / max(x.size - 2, 1)
    var_b = s2 / sxx
    cov = np.array([[s2 / x.size + xm * xm * var_b, -xm * var_b], [-xm * var_b, var_b]])
    return np.array([a, b]), cov, sse


def _gauss_loglik(sse: float, n: int) -> float:
    s2 = max(sse / n, 1e-300)
    return -0.5 * n * (math.log(2.0 * math.pi * s2) + 1.0)


def _fits(t: np.ndarray, a: np.ndarray) -> list[_Fit]:
    y = np.log(a)
    n = t.size
    out = []
    sse_flat = float(((y - y.mean()) ** 2).sum())
    out.append(
        _Fit("flat", 2, _gauss_loglik(sse_flat, n), np.array([y.mean(), 0.0]), np.zeros((2, 2)), n - 1)
    )
    coef, cov, sse = _ols(t, y)
    out.append(_Fit("exponential", 3, _gauss_loglik(sse, n), coef, cov, n - 2))
    coef, cov, sse = _ols(t, a)
    if coef[0] + coef[1] * t.min() > 0:  # a linear model must stay positive over the data
        out.append(_Fit("linear", 3, _gauss_loglik(sse, n) + float(y.sum()), coef, cov, n - 2))
    best = None
    for tc in t[1:-3]:  # at least 3 readings after the change point, 1 before
        x = np.maximum(t - tc, 0.0)
        coef, cov, sse = _ols(x, y)
        if coef[1] > 0 and (best is None or sse < best[2]):
            best = (coef, cov, sse, float(tc))
    if best is not None and n >= 7:
        out.append(
            _Fit("exponential after onset", 4, _gauss_loglik(best[2], n), best[0], best[1], n - 3, best[3])
        )
    return out


def _hampel(t: np.ndarray, y: np.ndarray, *, half: int = 3, nsig: float = 5.0) -> np.ndarray:
    """Boolean mask of isolated outliers in y (time order), worst first, at most one in ten readings.

    Each reading is compared with the straight line through its ``half`` neighbours on either side (so
    steady growth is not flagged); the robust scale comes from the first differences (MAD / sqrt 2).
    """
    n = y.size
    flag = np.zeros(n, dtype=bool)
    if n < 5:
        return flag
    d = np.diff(y)
    scale = 1.4826 * float(np.median(np.abs(d - np.median(d)))) / math.sqrt(2.0)
    if scale <= 0:
        return flag
    for _ in range(max(1, n // 10)):
        idx = np.flatnonzero(~flag)
        dev = np.zeros(idx.size)
        for j, i in enumerate(idx):
            left, right = idx[max(0, j - half) : j], idx[j + 1 : j + 1 + half]
            nb = np.concatenate((left, right))
            if nb.size >= 3 and np.ptp(t[nb]) > 0:
                ref = float(np.polyval(np.polyfit(t[nb], y[nb], 1), t[i]))
            else:
                ref = float(np.median(y[nb]))
            # an end reading is extrapolated from one side only: demand half as much again
            dev[j] = abs(y[i] - ref) / (1.0 if left.size and right.size else 1.5)
        worst = int(np.argmax(dev))
        if dev[worst] <= nsig * scale:
            break
        flag[idx[worst]] = True
    return flag


def fit_trend(
    time_days,
    amplitude,
    *,
    limit: float | None = None,
    speed_hz=None,
    speed_tolerance: float = 0.03,
    band_points: int = 60,
) -> TrendResult:
    """Robust trend of a subharmonic-amplitude series and the forecast of when it reaches ``limit``.

    ``time_days`` and ``amplitude`` (same length; NaN or <= 0 amplitude = gap). ``speed_hz`` optional, same
    length: only readings within ``speed_tolerance`` (fraction) of the latest reading's speed are used.
    Returns status ``forecast`` (limit crossing forecast), ``no_growth`` (no significant growth: no forecast),
    ``above_limit`` (the latest reading or the fitted level is at or above the limit), ``no_limit`` (trend
    only) or ``not_enough_data`` (fewer than 5 usable readings or no time span).
    """
    t_all = np.asarray(time_days, dtype=float).ravel()
    a_all = np.asarray(amplitude, dtype=float).ravel()
    if t_all.size != a_all.size:
        raise ValueError(f"time_days has {t_all.size} values but amplitude has {a_all.size}")
    if limit is not None and not (math.isfinite(limit) and limit > 0):
        raise ValueError(f"limit must be a positive number, got {limit!r}")
    if not (0 < speed_tolerance < 1):
        raise ValueError(f"speed_tolerance must be a fraction between 0 and 1, got {speed_tolerance!r}")
    n_total = t_all.size
    ok = np.isfinite(t_all) & np.isfinite(a_all) & (a_all > 0)
    n_gaps = int((~ok).sum())
    n_other = 0
    if speed_hz is not None:
        s_all = np.asarray(speed_hz, dtype=float).ravel()
        if s_all.size != n_total:
            raise ValueError(f"speed_hz has {s_all.size} values but amplitude has {n_total}")
        cand = ok & np.isfinite(s_all)
        if cand.any():
            ref = s_all[cand][np.argmax(t_all[cand])]
            same = np.abs(s_all / ref - 1.0) <= speed_tolerance
            n_other = int((ok & ~same).sum())
            ok &= same
    order = np.argsort(t_all[ok], kind="stable")
    t, a = t_all[ok][order], a_all[ok][order]
    base = {
        "n_total": n_total,
        "n_used": int(t.size),
        "n_other_speed": n_other,
        "n_gaps": n_gaps,
        "limit": limit,
    }
    if t.size:
        base.update(last_day=float(t[-1]), last_value=float(a[-1]))
    if t.size < MIN_POINTS or np.ptp(t) <= 0:
        return TrendResult(
            "not_enough_data",
            f"need at least {MIN_POINTS} usable readings over a time span at one speed; have {t.size}",
            **base,
        )
    out = _hampel(t, np.log(a))
    base["n_outliers"] = int(out.sum())
    base["outlier_days"] = t[out].tolist()
    t, a = t[~out], a[~out]
    base["n_used"] = int(t.size)
    if t.size < MIN_POINTS:
        return TrendResult("not_enough_data", f"only {t.size} readings left after removing outliers", **base)
    shift = float(t[-1])  # fit in days before the latest reading: keeps the intercept well conditioned
    t = t - shift
    fits = _fits(t, a)
    n = t.size
    aicc = {
        f.name: -2 * f.loglik
        + 2 * f.k
        + (2 * f.k * (f.k + 1) / (n - f.k - 1) if n - f.k - 1 > 0 else math.inf)
        for f in fits
    }
    bic = {f.name: -2 * f.loglik + f.k * math.log(n) for f in fits}
    # parsimony: the change-point model (one more parameter) must win by more than 2 AICc units
    simple = [f for f in fits if f.onset is None]
    best = min(simple, key=lambda f: aicc[f.name])
    for f in fits:
        if f.onset is not None and aicc[f.name] < aicc[best.name] - 2.0:
            best = f
    return _report(best, t, a, limit, base, aicc, bic, band_points, shift)


def _report(best: _Fit, t, a, limit, base, aicc, bic, band_points, shift) -> TrendResult:
    base.update(model=best.name, aicc=aicc, bic=bic)
    t_last = float(t[-1])
    if best.name == "flat":
        return TrendResult("no_growth", "no growth: a constant level fits best (AICc)", **base)
    a0, b = float(best.coef[0]), float(best.coef[1])
    var_b = float(best.cov[1, 1])
    t95 = stats.t.ppf(0.975, best.df)
    logscale = best.name != "linear"
    origin = best.onset if best.onset is not None else 0.0
    if logscale:
        base.update(
            growth_per_day=b,
            growth_db_per_day=DB_PER_NEPER * b,
            growth_db_per_day_lo=DB_PER_NEPER * (b - t95 * math.sqrt(var_b)),
            growth_db_per_day_hi=DB_PER_NEPER * (b + t95 * math.sqrt(var_b)),
            doubling_days=math.log(2.0) / b if b > 0 else None,
            onset_day=None if best.onset is None else best.onset + shift,
        )
    else:
        base.update(slope_per_day=b)
    base["band"] = _band(best, t, t95, band_points, logscale, origin, shift)
    significant = b - t95 * math.sqrt(var_b) > 0
    if limit is None:
        return TrendResult("no_limit", "trend only (no limit given)", **base)
    y0 = math.log(limit) if logscale else limit
    fitted_last = a0 + b * (t_last - origin)
    if a[-1] >= limit or fitted_last >= y0:
        base["days_to_limit"] = 0.0
        return TrendResult(
            "above_limit", "the latest reading or the fitted level is already at or above the limit", **base
        )
    if not significant:
        return TrendResult(
            "no_growth",
            f"growth not significant (95 % interval of the {best.name} slope includes zero); no forecast",
            **base,
        )
    t90 = stats.t.ppf(0.95, best.df)
    lo, hi = fieller_crossing(a0, b, float(best.cov[0, 0]), var_b, float(best.cov[0, 1]), y0, t90)
    x_cross = (y0 - a0) / b
    base["days_to_limit"] = x_cross + origin - t_last
    base["days_to_limit_lo"] = None if lo is None else max(0.0, lo + origin - t_last)
    base["days_to_limit_hi"] = None if hi is None else hi + origin - t_last
    return TrendResult(
        "forecast", f"{best.name} growth reaches the limit in about {base['days_to_limit']:.1f} days", **base
    )


def _band(best: _Fit, t, t95, points, logscale, origin, shift) -> dict:
    """Fitted mean and its 95 % confidence band over the data span (amplitude units), for charts."""
    grid = np.linspace(float(t[0]), float(t[-1]), points)
    x = grid - origin if best.onset is None else np.maximum(grid - origin, 0.0)
    mean = best.coef[0] + best.coef[1] * x
    var = best.cov[0, 0] + 2 * x * best.cov[0, 1] + x * x * best.cov[1, 1]
    half = t95 * np.sqrt(np.maximum(var, 0.0))
    lo, hi = mean - half, mean + half
    if logscale:
        mean, lo, hi = np.exp(mean), np.exp(lo), np.exp(hi)
    return {"days": (grid + shift).tolist(), "fit": mean.tolist(), "lo": lo.tolist(), "hi": hi.tolist()}
