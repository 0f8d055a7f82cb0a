"""Operating window: the instability tongue in (1X frequency, 1X amplitude) fitted to a point's history.

Model (first-order damped Mathieu, Landau & Lifshitz, Mechanics §27): the 1X amplitude a sets the
modulation depth h = k a; at 1X frequency f the threshold is h_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2),
so the amplitude threshold is a_c(f) = h_c(f) / k and the growth rate is
lambda = -zeta w0 + 1/2 sqrt((k a w0 / 2)^2 - (2 pi (f - 2 f0))^2).

Likelihood: each labelled record says present (1) or absent (0); P(present) = e + (1 - 2e) Phi(ln(a/a_c)/s)
(probit on the log margin, s fitted, e = 1 % label noise). Records with a positive within-record growth
rate add a Gaussian term for lambda (scale fitted). Parameters f0, ln zeta, ln k, ln s (, ln s_g) by
maximum likelihood (SLSQP), covariance from the numerical Hessian, and 90 % intervals of the
derived outputs from 2000 draws of that Laplace approximation.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy import optimize
from scipy.special import log_ndtr

__all__ = ["WindowFit", "fit_operating_window", "threshold_amplitude", "threshold_margin"]

LABEL_NOISE = 0.01
MIN_RECORDS = 10


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

    def to_dict(self) -> dict:
        """JSON-ready dict (non-finite numbers become None)."""
        d = asdict(self)
        for key, val in d.items():
            if isinstance(val, float) and not math.isfinite(val):
                d[key] = None
            if isinstance(val, tuple):
                d[key] = [float(v) for v in val]
        return d


def threshold_amplitude(f, f0, zeta, k):
    """The 1X amplitude threshold of the first-order damped Mathieu tongue (the one home of a_c(f)).

    Parameters
    ----------
    f : float or array_like
        1X (forcing) frequency in Hz.
    f0 : float
        Natural frequency of the subharmonic mode in Hz.
    zeta : float
        Damping ratio of that mode.
    k : float
        Modulation depth per unit of 1X amplitude (h = k a).

    Returns
    -------
    float or ndarray
        a_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2) / k, in the units of the 1X amplitude.

    References
    ----------
    L. D. Landau and E. M. Lifshitz, *Mechanics*, 3rd ed., §27 (parametric resonance, with friction).
    """
    return 2.0 * np.sqrt(((np.asarray(f, dtype=float) - 2.0 * f0) / f0) ** 2 + 4.0 * zeta**2) / k


_threshold_amp = threshold_amplitude


def threshold_margin(speed_hz: float, amp_1x: float, f0: float, zeta: float, k: float) -> float | None:
    """Margin to the instability threshold, ``1 - a_1X / a_c(f)``.

    Parameters
    ----------
    speed_hz, amp_1x : float
        Today's 1X frequency (Hz) and 1X amplitude (the fit's units).
    f0, zeta, k : float
        Parameters of an operating-window fit (see :func:`threshold_amplitude`).

    Returns
    -------
    float or None
        1 far from the threshold, 0 on it, negative beyond it; ``None`` when an input is missing,
        not finite or not positive.
    """
    vals = (speed_hz, amp_1x, f0, zeta, k)
    if not all(isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) for v in vals):
        return None
    if not (f0 > 0 and zeta > 0 and k > 0):
        return None
    a_c = float(threshold_amplitude(speed_hz, f0, zeta, k))
    return 1.0 - amp_1x / a_c if a_c > 0 else None


def _growth(f, a, f0, zeta, k):
    w0 = 2.0 * math.pi * f0
    eps = 2.0 * math.pi * (f - 2.0 * f0)
    disc = (k * a * w0 / 2.0) ** 2 - eps**2
    return -zeta * w0 + 0.5 * np.sqrt(np.clip(disc, 0.0, None))


def _negloglik(theta, f, la, y, fg, ag, g):
    f0, lz, lk, ls = theta[:4]
    zeta, k, s = math.exp(lz), math.exp(lk), math.exp(ls)
    # y holds +1 (present) / -1 (absent): P(label) = e + (1 - 2e) Phi(y m), in log-sum-exp form
    m = y * (la - np.log(_threshold_amp(f, f0, zeta, k))) / s
    le, l1 = math.log(LABEL_NOISE), math.log(1.0 - 2.0 * LABEL_NOISE)
    nll = -float(np.sum(np.logaddexp(le, l1 + log_ndtr(m))))
    if g.size:
        sg = math.exp(theta[4])
        r = (g - _growth(fg, ag, f0, zeta, k)) / sg
        nll += float(0.5 * np.sum(r * r) + g.size * theta[4])
    return nll


def _hessian(fun, x, steps):
    n = x.size
    h = np.zeros((n, n))
    f0 = fun(x)
    for i in range(n):
        for j in range(i, n):
            ei = np.zeros(n)
            ej = np.zeros(n)
            ei[i], ej[j] = steps[i], steps[j]
            if i == j:
                val = (fun(x + ei) - 2 * f0 + fun(x - ei)) / steps[i] ** 2
            else:
                val = (fun(x + ei + ej) - fun(x + ei - ej) - fun(x - ei + ej) + fun(x - ei - ej)) / (
                    4 * steps[i] * steps[j]
                )
            h[i, j] = h[j, i] = val
    return h


def fit_operating_window(
    speed_hz,
    amp_1x,
    present,
    *,
    growth_rate_per_s=None,
    today_speed_hz: float,
    today_amp_1x: float,
    seed: int = 0,
) -> WindowFit:
    """Fit f0, zeta and k of the tongue to a history and evaluate today's margin.

    ``speed_hz`` (1X frequency), ``amp_1x`` (> 0) and ``present`` (1/0, NaN = unlabelled) have one value per
    record; ``growth_rate_per_s`` optional (NaN or <= 0 = no growth measured). Statuses: ``fit``,
    ``weakly_constrained`` (fit but some parameter uncertain by more than its own size), ``one_speed``
    (speeds too close to separate f0, zeta and k: only today's amplitude threshold), ``no_onset_seen`` /
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
    ok = np.isfinite(f) & (f > 0) & np.isfinite(a) & (a > 0) & np.isfinite(y)
    f, a, y, g_all = f[ok], a[ok], (y[ok] > 0.5).astype(float), g_all[ok]
    n, npres = int(f.size), int(y.sum())
    base: dict[str, Any] = {
        "n_records": n,
        "n_present": npres,
        "today_speed_hz": today_speed_hz,
        "today_amp_1x": today_amp_1x,
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
    grow = np.isfinite(g_all) & (g_all > 0) & (y > 0.5)
    fg, ag, g = f[grow], a[grow], g_all[grow]
    base["n_growth"] = int(g.size)
    la = np.log(a)
    args = (f, la, 2.0 * y - 1.0, fg, ag, g)
    # start and first fit on at most 2000 records, then polish on all of them
    sub = np.random.default_rng(seed).permutation(n)[:2000] if n > 2000 else np.arange(n)
    gsub = np.flatnonzero(grow)[:500]
    args_sub = (f[sub], la[sub], 2.0 * y[sub] - 1.0, f[gsub], a[gsub], g_all[gsub])
    x0 = _start(f[sub], a[sub], y[sub], g, args_sub)
    bounds = [
        (0.2 * float(f.min()), 2.0 * float(f.max())),
        (math.log(1e-4), math.log(0.5)),
        (-30.0, 30.0),
        (math.log(0.01), math.log(2.0)),
    ] + ([(math.log(1e-4), math.log(1e3))] if g.size else [])
    if sub.size < n:
        x0 = optimize.minimize(_negloglik, x0, args=args_sub, method="SLSQP", bounds=bounds).x
    res = optimize.minimize(_negloglik, x0, args=args, method="SLSQP", bounds=bounds)
    th = res.x
    cov, good = _covariance(th, bounds, args)
    return _summarise(th, cov, good, base, today_speed_hz, today_amp_1x, seed)


def _covariance(th, bounds, args):
    """Inverse numerical Hessian over the parameters not pinned at a bound (those get zero variance)."""
    free = np.array([lo + 1e-6 < v < hi - 1e-6 for v, (lo, hi) in zip(th, bounds, strict=True)])
    cov = np.zeros((th.size, th.size))
    idx = np.flatnonzero(free)

    def fun(v):
        full = th.copy()
        full[idx] = v
        return _negloglik(full, *args)

    steps = np.array([max(1e-4 * abs(th[i]), 1e-6) if i == 0 else 1e-3 for i in idx])
    hess = _hessian(fun, th[idx], steps)
    if not free[:3].all() or not np.all(np.isfinite(hess)) or np.any(np.linalg.eigvalsh(hess) <= 0):
        return np.full_like(cov, np.nan), False
    cov[np.ix_(idx, idx)] = np.linalg.inv(hess)
    return cov, True


def _start(f, a, y, g, args):
    """Coarse profile over f0 (speeds where the line was present, halved), then k from the amplitudes."""
    fp = f[y > 0.5]
    best = None
    for f0 in np.linspace(0.45 * float(fp.min()), 0.55 * float(fp.max()), 25):
        for zeta in (0.005, 0.02, 0.08):
            k = 4.0 * zeta / float(np.quantile(a[y > 0.5], 0.2))
            th = np.array(
                [f0, math.log(zeta), math.log(k), math.log(0.2)] + ([math.log(0.3)] if g.size else [])
            )
            val = _negloglik(th, *args)
            if best is None or val < best[0]:
                best = (val, th)
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
    hess = _hessian(nll, res.x, np.array([1e-3, 1e-3]))
    se = math.sqrt(max(np.linalg.inv(hess)[0, 0], 0.0)) if np.linalg.det(hess) > 0 else math.nan
    ac = math.exp(res.x[0])
    z90 = 1.6448536269514722
    lo, hi = ac * math.exp(-z90 * se), ac * math.exp(z90 * se)
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
        draws = np.random.default_rng(seed).multivariate_normal(th, cov, size=2000, check_valid="ignore")
        with np.errstate(over="ignore", invalid="ignore"):
            d_ac = _threshold_amp(speed, draws[:, 0], np.exp(draws[:, 1]), np.exp(draws[:, 2]))
        lo, hi = np.quantile(d_ac, [0.05, 0.95])
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
    msg = (
        "inside the unstable band at today's amplitude"
        if band and band[0] <= speed <= band[1]
        else ("outside the unstable band at today's amplitude")
    )
    return WindowFit("fit", msg, **out)


def _band(f0, zeta, k, amp):
    disc = (k * amp / 2.0) ** 2 - 4.0 * zeta**2
    if disc <= 0:
        return None
    half = f0 * math.sqrt(disc)
    return (2.0 * f0 - half, 2.0 * f0 + half)
