"""Operating-window fit: the tongue of analysis.tongue fitted to a point's history of labelled readings.

Likelihood: each labelled record says present (1) or absent (0); P(present) = e + (1 - 2e) Phi(ln(a/a_c)/s)
(probit on the log margin, s fitted, e = 1 % label noise). Records caught growing (rate of at least
GROWTH_FLOOR_PER_S with the line present) add a Gaussian term for lambda (scale fitted). Parameters f0,
ln zeta, ln k, ln s (, ln s_g) by maximum likelihood (SLSQP). Covariance: the delete-one-cluster
jackknife with the readings of one day as a cluster (the clustered sandwich when one day alone decides the
fit), never below the inverse Hessian (analysis.window_stats).
Every stated interval is 95 %: Wald intervals for f0 (Hz) and for zeta and k on the log scale, and the
2.5-97.5 % quantiles of 2000 draws of that normal approximation for derived outputs.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy import optimize
from scipy.special import log_ndtr

from analysis.physics import window_stats as ws
from analysis.physics.tongue import band as _band
from analysis.physics.tongue import growth_rate as _growth
from analysis.physics.tongue import threshold_amplitude as _threshold_amp

__all__ = ["WindowFit", "fit_operating_window", "speed_ranges"]

LABEL_NOISE = 0.01
MIN_RECORDS = 10
CI_LEVEL = 0.95  # every interval the fit states
Z95 = 1.959963984540054  # scipy.stats.norm.ppf(0.975)
#: a growth rate counts only from this value up: a line in a steady limit cycle reads about 0 per second
#: (95 % of the demo's simulated limit-cycle readings below 0.002 1/s), which says nothing of the linear rate
GROWTH_FLOOR_PER_S = 0.01
CLUSTER_S = 86400.0  # readings of one day share a cluster in the robust covariance
SPEED_GAP = 0.01  # speeds further apart than 1 % of the median count as separate speeds
#: fewer readings than this with the line present (or absent) and the 95 % intervals under-cover on
#: simulated histories (bench/window_coverage.py): about 0.8 at 25 present of 300 (labels and growth), 0.89
#: at 50 of 600 from labels alone; 0.93-0.95 from about 85 of 1000 up
MIN_EACH_LABEL = 80


@dataclass(frozen=True)
class WindowFit:
    """Result of ``fit_operating_window``; ``to_dict`` is the JSON of ``halfwatch window``."""

    status: str
    message: str
    n_records: int
    n_present: int
    n_growth: int = 0
    f0_hz: float | None = None
    f0_hz_se: float | None = None
    zeta: float | None = None
    zeta_se: float | None = None
    k_per_unit: float | None = None
    k_per_unit_se: float | None = None
    today_speed_hz: float | None = None
    today_amp_1x: float | None = None
    amp_threshold: float | None = None
    amp_threshold_lo: float | None = None
    amp_threshold_hi: float | None = None
    margin_pct: float | None = None
    margin_pct_lo: float | None = None
    margin_pct_hi: float | None = None
    ratio_to_threshold_pct: float | None = None
    unstable_band_hz: tuple[float, float] | None = None
    growth_rate_today_per_s: float | None = None
    f0_hz_ci95: tuple[float, float] | None = None
    zeta_ci95: tuple[float, float] | None = None
    k_per_unit_ci95: tuple[float, float] | None = None
    #: covariance of (f0_hz, ln zeta, ln k) used for every interval (cluster-robust, see _covariance)
    param_cov: tuple[tuple[float, ...], ...] | None = None
    n_clusters: int = 0
    n_speeds: int = 0
    #: days without whose readings the fit is not defined (then the interval is the sandwich's)
    n_decisive_days: int = 0

    def to_dict(self) -> dict:
        """JSON-ready dict (non-finite numbers become None)."""
        d = asdict(self)
        for key, val in d.items():
            if isinstance(val, float) and not math.isfinite(val):
                d[key] = None
            if isinstance(val, tuple):
                d[key] = [[float(x) for x in v] if isinstance(v, tuple) else float(v) for v in val]
        return d


def _terms(theta, f, la, y, gmask, g):
    """Negative log-likelihood of each record (label term, plus the growth term where one is used)."""
    f0, lz, lk, ls = theta[:4]
    zeta, k, s = math.exp(lz), math.exp(lk), math.exp(ls)
    # y holds +1 (present) / -1 (absent): P(label) = e + (1 - 2e) Phi(y m), in log-sum-exp form
    m = y * (la - np.log(_threshold_amp(f, f0, zeta, k))) / s
    le, l1 = math.log(LABEL_NOISE), math.log(1.0 - 2.0 * LABEL_NOISE)
    out = -np.logaddexp(le, l1 + log_ndtr(m))
    if gmask.any():
        sg = math.exp(theta[4])
        r = (g[gmask] - _growth(f[gmask], np.exp(la[gmask]), f0, zeta, k)) / sg
        out[gmask] += 0.5 * r * r + theta[4]
    return out


def _negloglik(theta, *args):
    return float(np.sum(_terms(theta, *args)))


def _take(args, idx):
    return tuple(v[idx] for v in args)


def fit_operating_window(
    speed_hz,
    amp_1x,
    present,
    *,
    growth_rate_per_s=None,
    time_s=None,
    today_speed_hz: float,
    today_amp_1x: float,
    seed: int = 0,
) -> WindowFit:
    """Fit f0, zeta and k of the tongue to a history and evaluate today's margin.

    ``speed_hz`` (1X frequency), ``amp_1x`` (> 0) and ``present`` (1/0, NaN = unlabelled) have one value per
    record; ``growth_rate_per_s`` optional: only rates of at least :data:`GROWTH_FLOOR_PER_S` on records
    with the line present count (a line in a steady limit cycle reads about zero whatever its linear
    growth rate was). ``time_s`` (epoch seconds, optional) groups the records into days for the robust
    covariance; without it each record is its own group. Statuses: ``fit``,
    ``weakly_constrained`` (fit but some parameter uncertain by more than its own size, or the speeds seen
    cannot separate f0, zeta and k), ``one_speed`` (only today's amplitude threshold), ``no_onset_seen`` /
    ``never_absent`` (labels all one way) and ``not_enough_data``.
    """
    f = np.asarray(speed_hz, dtype=float).ravel()
    a = np.asarray(amp_1x, dtype=float).ravel()
    y = np.asarray(present, dtype=float).ravel()
    if not (f.size == a.size == y.size):
        raise ValueError(f"speed_hz, amp_1x and present differ in length ({f.size}, {a.size}, {y.size})")
    for name, v in (("today_speed_hz", today_speed_hz), ("today_amp_1x", today_amp_1x)):
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"{name} must be a positive number, got {v!r}")
    g_all = (
        np.full(f.size, np.nan) if growth_rate_per_s is None else np.asarray(growth_rate_per_s, float).ravel()
    )
    if g_all.size != f.size:
        raise ValueError(f"growth_rate_per_s has {g_all.size} values, expected {f.size}")
    t_all = np.arange(f.size) * CLUSTER_S if time_s is None else np.asarray(time_s, float).ravel()
    if t_all.size != f.size:
        raise ValueError(f"time_s has {t_all.size} values, expected {f.size}")
    ok = np.isfinite(f) & (f > 0) & np.isfinite(a) & (a > 0) & np.isfinite(y)
    f, a, y, g_all, t_all = f[ok], a[ok], (y[ok] > 0.5).astype(float), g_all[ok], t_all[ok]
    n, npres = int(f.size), int(y.sum())
    base: dict[str, Any] = {
        "n_records": n,
        "n_present": npres,
        "today_speed_hz": float(today_speed_hz),
        "today_amp_1x": float(today_amp_1x),
    }
    if n < MIN_RECORDS:
        return WindowFit(
            "not_enough_data",
            f"need at least {MIN_RECORDS} labelled records with speed and 1X amplitude; have {n}",
            **base,
        )
    if npres == 0:
        return WindowFit(
            "no_onset_seen",
            "the half-order line was never present: the threshold lies above "
            f"every 1X amplitude seen so far (largest {a.max():.4g}); the data do not constrain "
            "the window",
            **base,
        )
    if npres == n:
        return WindowFit(
            "never_absent",
            "the half-order line was present in every record: the threshold lies "
            f"below every 1X amplitude seen (smallest {a.min():.4g}); the data do not constrain "
            "the window",
            **base,
        )
    if np.ptp(f) / np.median(f) < 0.01:
        return _one_speed(f, a, y, base)
    gmask = np.isfinite(g_all) & (g_all >= GROWTH_FLOOR_PER_S) & (y > 0.5)
    g = np.where(gmask, g_all, 0.0)
    base["n_growth"] = int(gmask.sum())
    la = np.log(a)
    args = (f, la, 2.0 * y - 1.0, gmask, g)
    # start and first fit on at most 2000 records, then polish on all of them
    sub = np.random.default_rng(seed).permutation(n)[:2000] if n > 2000 else np.arange(n)
    args_sub = _take(args, sub)
    x0 = _start(args_sub, with_growth=bool(gmask.any()))
    bounds = [
        (0.2 * float(f.min()), 2.0 * float(f.max())),
        (math.log(1e-4), math.log(0.5)),
        (-30.0, 30.0),
        (math.log(0.01), math.log(2.0)),
    ] + ([(math.log(1e-4), math.log(1e3))] if gmask.any() else [])
    if sub.size < n:
        x0 = optimize.minimize(_negloglik, x0, args=args_sub, method="SLSQP", bounds=bounds).x
    res = optimize.minimize(_negloglik, x0, args=args, method="SLSQP", bounds=bounds)
    th = res.x
    clusters = np.floor(t_all / CLUSTER_S)
    cov, good, n_clusters, decisive = _covariance(th, bounds, args, clusters)
    base["n_clusters"] = n_clusters
    base["n_decisive_days"] = decisive
    base["n_speeds"] = len(speed_ranges(f))
    return _summarise(th, cov, good, base, float(today_speed_hz), float(today_amp_1x), seed)


def speed_ranges(speeds) -> tuple[tuple[float, float], ...]:
    """The separate speeds run, as (lowest, highest) Hz per group: sorted speeds split where a gap exceeds
    :data:`SPEED_GAP` of the median speed."""
    s = np.sort(np.asarray(speeds, dtype=float))
    if s.size == 0:
        return ()
    cuts = np.flatnonzero(np.diff(s) > SPEED_GAP * float(np.median(s))) + 1
    return tuple((float(g[0]), float(g[-1])) for g in np.split(s, cuts))


def _covariance(th, bounds, args, clusters):
    """Covariance over the parameters not pinned at a bound (those get zero variance): the
    delete-one-day jackknife, or the day-clustered sandwich when some day alone decides the fit; never
    below the inverse Hessian (:mod:`analysis.window_stats`)."""
    free = np.array([lo + 1e-6 < v < hi - 1e-6 for v, (lo, hi) in zip(th, bounds, strict=True)])
    cov = np.zeros((th.size, th.size))
    idx = np.flatnonzero(free)

    def full(v):
        out = th.copy()
        out[idx] = v
        return out

    steps = np.array([max(1e-4 * abs(th[i]), 1e-6) if i == 0 else 1e-3 for i in idx])
    hess = ws.hessian(lambda v: _negloglik(full(v), *args), th[idx], steps)
    if not free[:3].all() or not np.all(np.isfinite(hess)) or np.any(np.linalg.eigvalsh(hess) <= 0):
        return np.full_like(cov, np.nan), False, 0, 0
    terms = lambda v: _terms(full(v), *args)  # noqa: E731
    score = ws.scores(terms, th[idx], steps)
    robust, g = ws.sandwich(hess, score, clusters)
    jack, decisive = ws.cluster_jackknife(hess, score, ws.record_hessians(terms, th[idx], steps), clusters)
    cov[np.ix_(idx, idx)] = ws.not_below_model(robust if jack is None else jack, np.linalg.inv(hess))
    return cov, bool(np.all(np.isfinite(cov))), g, decisive


def _start(args, *, with_growth: bool):
    """Coarse profile over f0 (speeds where the line was present, halved), then k from the amplitudes."""
    f, la, ypm = args[0], args[1], args[2]
    fp, ap = f[ypm > 0], np.exp(la[ypm > 0])
    best: tuple[float, np.ndarray] | None = None
    for f0 in np.linspace(0.45 * float(fp.min()), 0.55 * float(fp.max()), 25):
        for zeta in (0.005, 0.02, 0.08):
            k = 4.0 * zeta / float(np.quantile(ap, 0.2))
            th = np.array(
                [f0, math.log(zeta), math.log(k), math.log(0.2)] + ([math.log(0.3)] if with_growth else [])
            )
            val = _negloglik(th, *args)
            if best is None or val < best[0]:
                best = (val, th)
    assert best is not None
    return best[1]


def _one_speed(f, a, y, base) -> WindowFit:
    """Speeds all within 1 %: probit on ln a gives the amplitude threshold at this speed only."""
    la = np.log(a)

    def nll(th):
        m = (la - th[0]) / math.exp(th[1])
        le, l1 = math.log(LABEL_NOISE), math.log(1.0 - 2.0 * LABEL_NOISE)
        return -float(
            np.sum(np.where(y > 0.5, np.logaddexp(le, l1 + log_ndtr(m)), np.logaddexp(le, l1 + log_ndtr(-m))))
        )

    x0 = np.array([float(np.median(la)), math.log(0.2)])
    res = optimize.minimize(nll, x0, method="SLSQP", bounds=[(-50, 50), (math.log(0.01), math.log(2.0))])
    hess = ws.hessian(nll, res.x, np.array([1e-3, 1e-3]))
    se = math.sqrt(max(np.linalg.inv(hess)[0, 0], 0.0)) if np.linalg.det(hess) > 0 else math.nan
    ac = math.exp(res.x[0])
    lo, hi = ac * math.exp(-Z95 * se), ac * math.exp(Z95 * se)
    amp = base["today_amp_1x"]
    msg = (
        f"all records at one speed ({float(np.median(f)):.4g} Hz): f0, zeta and the unstable speed band "
        "are not "
        "constrained; only the 1X amplitude threshold at this speed is"
    )
    return WindowFit(
        "one_speed",
        msg,
        **base,
        amp_threshold=ac,
        amp_threshold_lo=lo,
        amp_threshold_hi=hi,
        margin_pct=100 * (1 - amp / ac),
        margin_pct_lo=100 * (1 - amp / lo),
        margin_pct_hi=100 * (1 - amp / hi),
        ratio_to_threshold_pct=100 * amp / ac,
    )


def _summarise(th, cov, good, base, speed, amp, seed) -> WindowFit:
    f0, zeta, k = float(th[0]), math.exp(th[1]), math.exp(th[2])
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None)) if good else np.full(th.size, np.nan)
    ac = float(_threshold_amp(speed, f0, zeta, k))
    out = dict(
        base,
        f0_hz=f0,
        f0_hz_se=float(se[0]),
        zeta=zeta,
        zeta_se=float(zeta * se[1]),
        k_per_unit=k,
        k_per_unit_se=float(k * se[2]),
        amp_threshold=ac,
        margin_pct=100 * (1 - amp / ac),
        ratio_to_threshold_pct=100 * amp / ac,
        growth_rate_today_per_s=float(_growth(speed, amp, f0, zeta, k)),
    )
    band = _band(f0, zeta, k, amp)
    out["unstable_band_hz"] = band
    if good:
        # Wald intervals: f0 on its own scale, zeta and k on the log scale they are fitted on
        out.update(
            f0_hz_ci95=(f0 - Z95 * float(se[0]), f0 + Z95 * float(se[0])),
            zeta_ci95=(zeta * math.exp(-Z95 * float(se[1])), zeta * math.exp(Z95 * float(se[1]))),
            k_per_unit_ci95=(k * math.exp(-Z95 * float(se[2])), k * math.exp(Z95 * float(se[2]))),
            param_cov=tuple(tuple(float(v) for v in row) for row in cov[:3, :3]),
        )
        draws = np.random.default_rng(seed).multivariate_normal(th, cov, size=2000, check_valid="ignore")
        with np.errstate(over="ignore", invalid="ignore"):
            d_ac = _threshold_amp(speed, draws[:, 0], np.exp(draws[:, 1]), np.exp(draws[:, 2]))
        lo, hi = np.quantile(d_ac, [(1 - CI_LEVEL) / 2, (1 + CI_LEVEL) / 2])
        out.update(
            amp_threshold_lo=float(lo),
            amp_threshold_hi=float(hi),
            margin_pct_lo=100 * (1 - amp / lo),
            margin_pct_hi=100 * (1 - amp / hi),
        )
    rel = [se[0] / f0, se[1], se[2]]
    if not good or not all(math.isfinite(r) for r in rel):
        return WindowFit(
            "weakly_constrained",
            "the likelihood is flat in some direction: the data do not "
            "constrain f0, zeta and k together (add records at other speeds or amplitudes)",
            **out,
        )
    if max(rel[1], rel[2]) > 1.0 or rel[0] > 0.05:
        return WindowFit(
            "weakly_constrained",
            "fit made, but zeta or k is uncertain by more than its own size "
            "(or f0 by more than 5 %): treat the window as indicative",
            **out,
        )
    few = min(base["n_present"], base["n_records"] - base["n_present"])
    if few < MIN_EACH_LABEL:
        return WindowFit(
            "weakly_constrained",
            f"fit made from {base['n_present']} readings with the half-order line present and "
            f"{base['n_records'] - base['n_present']} without: below {MIN_EACH_LABEL} of each the stated "
            "95 % intervals cover the truth less often than they say; treat the window as indicative",
            **out,
        )
    msg = (
        "inside the unstable band at today's amplitude"
        if band and band[0] <= speed <= band[1]
        else ("outside the unstable band at today's amplitude")
    )
    if base.get("n_decisive_days"):
        msg += (f"; the readings of {base['n_decisive_days']} day(s) decide the fit on their own, so the "
                "intervals come from the day-clustered sandwich and may be too narrow")
    return WindowFit("fit", msg, **out)


