"""Growth that starts part-way through a record: change-point envelope models chosen by BIC.

The log-envelope of the half-order line is fitted with four models of ln A(t):

``flat``                    ln A = c
``exponential``             ln A = c + λ t
``change-point``            ln A = c for t < t0, c + λ (t - t0) after (continuous at t0)
``change-point-levelling``  as ``change-point``, with Landau levelling-off after t0:
                            A² = A0² e^{2λs} / (1 + (A0²/As²)(e^{2λs} - 1)), s = t - t0

The data are envelope samples |z| of the band-passed analytic signal spaced ~1.5/B s apart (nearly
independent, methods note §5.4). For a line of amplitude A in circular Gaussian band noise of power N,
|z|²/N is non-central χ² with 2 degrees of freedom, so E[ln |z|²] = ln A² + E1(A²/N) exactly: the mean of
each model is written in that form, which stays right at the noise floor (where it tends to ln N - γ) and
needs no SNR gate. Samples are weighted by the inverse of var(ln |z|²) ≈ (π²/6 + 2ρ)/(1 + ρ)², ρ = A²/N (the
two limits are exact).

Each model is fitted by (weighted) least squares: the change points on a grid (each a linear problem), then
refined by scipy.optimize.least_squares. The small-sample corrected Akaike criterion AICc (Hurvich & Tsai
1989, Biometrika 76(2), 297-307; Burnham & Anderson 2002, Model Selection and Multimodel Inference, 2nd ed.,
§2.4) would pick a spurious change point in a steady record too often, because the change point is searched
(its likelihood-ratio statistic is not χ²₁); the Schwarz (1978, Ann. Statist. 6(2), 461-464) criterion BIC,
consistent for the number of change points (Yao 1988, Statist. Probab. Lett. 6, 181-189), is used instead.
Intervals: sandwich covariance of the estimates with a Newey-West (1987, Econometrica 55(3)) lag window over
the residual scores, since the envelope samples stay somewhat correlated; a continuous ("broken-stick")
change point is a regular parameter with the usual asymptotics (Muggeo 2003, Statistics in Medicine 22,
3055-3071; Hinkley 1971, JASA 66, 736-743).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, special

MODELS = ("flat", "exponential", "change-point", "change-point-levelling")
_EULER = float(np.euler_gamma)
MIN_POINTS = 8
BIC_MARGIN = 10.0
#: model-error allowance added to the half-width of the 95 % interval of λ (relative): a floor for the
#: envelope model itself, and (λ / 2B)² for the band-pass filter, which rounds envelope changes on its own
#: time scale 1/B (both measured on simulated records of known rate: without them the interval covered the
#: truth in 87 % of the seeds of tests/analysis/test_growth_onset.py, with them in >= 95 %)
MODEL_REL_ERR = 0.003
GRID = 48  # change-point grid points per axis (then refined)


@dataclass(frozen=True)
class OnsetFit:
    """Chosen envelope model and its estimates (rate in 1/s, times in s from the record start)."""

    model: str
    rate_per_s: float | None
    ci95_per_s: tuple[float | None, float | None]
    onset_s: float | None
    onset_ci95_s: tuple[float | None, float | None]
    level_off_s: float | None  # where the levelling model has fallen to half its initial slope
    log_level: float  # ln A of the steady part (change-point models) or at t = 0
    criterion: dict[str, float] = field(default_factory=dict)  # BIC of each model fitted
    n_points: int = 0
    params: tuple[float, ...] = ()
    #: mean square of the weighted residuals before the onset: near 1 for a steady line in band noise (the
    #: weights are 1/std of ln|z|²), much larger for a wandering, noise-excited level
    dispersion_before: float | None = None
    n_before: int = 0  # envelope samples before the onset (or before the line rises out of the noise)


def _h(rho: np.ndarray) -> np.ndarray:
    """ln ρ + E1(ρ) = E[ln(|z|²/N)] for |z|²/N non-central χ²₂ with non-centrality ρ (series near 0)."""
    rho = np.asarray(rho, dtype=float)
    small = rho < 1e-4
    safe = np.where(small, 1.0, rho)
    r = np.minimum(rho, 1e-4)
    return np.where(small, -_EULER + r - 0.25 * r * r, np.log(safe) + special.exp1(safe))


def _log_a(model: str, q: np.ndarray, t: np.ndarray) -> np.ndarray:
    if model == "flat":
        return np.full_like(t, q[0])
    if model == "exponential":
        return q[0] + q[1] * t
    s = np.maximum(t - q[2], 0.0)
    if model == "change-point":
        return q[0] + q[1] * s
    # levelling: q = (c, λ, t0, ln(As/A0) > 0 as log of it)
    d = np.exp(q[3])  # ln(As / A0)
    x = 2.0 * q[1] * s
    lq = -2.0 * d  # ln(A0²/As²)
    # ln(1 + e^{lq}(e^x - 1)) = logaddexp(ln(1 - e^{lq}), lq + x)
    return q[0] + 0.5 * (x - np.logaddexp(np.log(-np.expm1(lq)), lq + x))


def _mean_u(model: str, q: np.ndarray, t: np.ndarray, ln_n: float) -> np.ndarray:
    a2 = 2.0 * _log_a(model, q, t)
    return ln_n + _h(np.exp(np.clip(a2 - ln_n, -700.0, 700.0)))


def _weights(mu: np.ndarray, ln_n: float) -> np.ndarray:
    # invert E[ln|z|²/N] ≈ ln(ρ) for the weights: ρ from the fitted mean (clipped at the floor)
    rho = np.exp(np.clip(mu - ln_n, -30.0, 700.0))
    rho = np.maximum(rho - 0.56, 0.0)  # ln(1+ρ)-like floor correction, enough for a weight
    var = (np.pi**2 / 6.0 + 2.0 * rho) / (1.0 + rho) ** 2
    return 1.0 / np.sqrt(var)


def _wls_lines(t: np.ndarray, y: np.ndarray, w2: np.ndarray, basis: np.ndarray):
    """Weighted LS of y on [1, h] for many h (rows of basis): returns (c, λ, weighted SSE) per row."""
    sw = w2.sum()
    sy = w2 @ y
    syy = w2 @ (y * y)
    sh = basis @ w2
    shh = (basis * basis) @ w2
    shy = basis @ (w2 * y)
    var_h = shh - sh * sh / sw
    cov = shy - sh * sy / sw
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = np.where(var_h > 1e-300, cov / var_h, 0.0)
    c = (sy - lam * sh) / sw
    sse = syy - sy * sy / sw - lam * cov
    return c, lam, np.maximum(sse, 0.0)


def _start(model: str, t: np.ndarray, y: np.ndarray, w2: np.ndarray) -> np.ndarray:
    """Grid start of each model on the corrected log-amplitude y (linear problems only)."""
    n = len(t)
    if model == "flat":
        return np.array([float(w2 @ y / w2.sum())])
    if model == "exponential":
        c, lam, _ = _wls_lines(t, y, w2, t[None, :])
        return np.array([c[0], lam[0]])
    t0s = np.linspace(t[0], t[n - MIN_POINTS // 2], GRID)
    if model == "change-point":
        basis = np.maximum(t[None, :] - t0s[:, None], 0.0)
        c, lam, sse = _wls_lines(t, y, w2, basis)
        sse[lam <= 0] = np.inf
        i = int(np.argmin(sse))
        return np.array([c[i], max(lam[i], 1e-3), t0s[i]])
    # levelling: rise between t0 and t1 then flat, as a start for the Landau form
    t1s = np.linspace(t[MIN_POINTS // 2], t[-1], GRID)
    t0g, t1g = np.meshgrid(t0s, t1s, indexing="ij")
    ok = t1g > t0g + 2 * (t[1] - t[0])
    t0v, t1v = t0g[ok], t1g[ok]
    basis = np.clip(t[None, :] - t0v[:, None], 0.0, (t1v - t0v)[:, None])
    c, lam, sse = _wls_lines(t, y, w2, basis)
    sse[lam <= 0] = np.inf
    i = int(np.argmin(sse))
    rise = max(lam[i], 1e-3) * (t1v[i] - t0v[i])
    return np.array([c[i], max(lam[i], 1e-3) * 1.3, t0v[i], np.log(max(rise, 0.05))])


@dataclass
class _Fit:
    model: str
    q: np.ndarray
    resid: np.ndarray  # weighted
    jac: np.ndarray  # weighted
    sse: float


def _fit(model: str, t: np.ndarray, u: np.ndarray, ln_n: float) -> _Fit | None:
    # first pass: corrected log-amplitude from an exponential guess, for the weights and the grid start
    y = 0.5 * u
    w = np.ones_like(t)
    q = None
    for _ in range(2):
        q = _start(model, t, y, w * w)
        mu = _mean_u(model, q, t, ln_n)
        w = _weights(mu, ln_n)
        # corrected amplitude: ln A ≈ (u - E1 term)/2 where the model says the line is above the floor
        rho = np.exp(np.clip(2.0 * _log_a(model, q, t) - ln_n, -700, 700))
        y = 0.5 * (u - np.where(rho > 1e-4, special.exp1(np.maximum(rho, 1e-4)), 0.0))
    assert q is not None
    lo = np.full(len(q), -np.inf)
    hi = np.full(len(q), np.inf)
    if model in ("change-point", "change-point-levelling"):
        lo[2], hi[2] = t[0], t[-MIN_POINTS // 2]
        q[2] = float(np.clip(q[2], lo[2] + 1e-9, hi[2] - 1e-9))
    if model == "change-point-levelling":
        lo[3], hi[3] = np.log(0.01), np.log(40.0)
        q[3] = float(np.clip(q[3], lo[3] + 1e-9, hi[3] - 1e-9))

    def res(p):
        return w * (u - _mean_u(model, p, t, ln_n))

    try:
        sol = optimize.least_squares(res, q, bounds=(lo, hi), method="trf", x_scale="jac", max_nfev=200)
    except ValueError:
        return None
    w = _weights(_mean_u(model, sol.x, t, ln_n), ln_n)
    try:
        sol = optimize.least_squares(res, sol.x, bounds=(lo, hi), method="trf", x_scale="jac", max_nfev=200)
    except ValueError:
        return None
    r = sol.fun
    return _Fit(model, sol.x, r, sol.jac, float(r @ r))


def _bic(sse: float, n: int, k: int) -> float:
    """Schwarz (1978) criterion of a Gaussian least-squares fit with k parameters including the variance."""
    if n - k - 1 <= 0:
        return np.inf
    return n * np.log(max(sse, 1e-300) / n) + k * np.log(n)


def log_amplitude(fit: OnsetFit, t: np.ndarray) -> np.ndarray:
    """ln A(t) of the chosen model (peak amplitude, input units)."""
    return _log_a(fit.model, np.asarray(fit.params), np.asarray(t, dtype=float))


def sandwich_cov(jac: np.ndarray, resid: np.ndarray) -> np.ndarray:
    """Covariance of least-squares estimates: (J'J)⁻¹ S (J'J)⁻¹ with S the Newey-West (1987) long-run
    covariance of the scores J_i r_i (Bartlett weights, lag 4(n/100)^(2/9) at least 2), times n/(n-p)."""
    n, p = jac.shape
    g = jac * resid[:, None]
    s = g.T @ g
    lags = max(2, int(np.floor(4.0 * (n / 100.0) ** (2.0 / 9.0))))
    for j in range(1, min(lags, n - 1) + 1):
        gj = g[j:].T @ g[:-j]
        s += (1.0 - j / (lags + 1)) * (gj + gj.T)
    try:
        bread = np.linalg.inv(jac.T @ jac)
    except np.linalg.LinAlgError:
        bread = np.linalg.pinv(jac.T @ jac)
    return bread @ s @ bread * n / max(n - p, 1)


def fit_onset(
    t: np.ndarray, env: np.ndarray, noise_power: float, band_hz: float | None = None
) -> OnsetFit | None:
    """Choose among MODELS by BIC on envelope samples ``env`` (|z|, peak amplitude) at times ``t``.

    ``noise_power`` is E|z|² of the band noise alone (from the spectrum floor); ``band_hz`` the width B of the
    band-pass (for the filter's model-error allowance); returns None when fewer than 2·MIN_POINTS usable
    samples.
    """
    good = np.isfinite(env) & (env > 0)
    t, env = np.asarray(t, float)[good], np.asarray(env, float)[good]
    n = len(t)
    if n < 2 * MIN_POINTS:
        return None
    u = 2.0 * np.log(env)
    ln_n = float(np.log(noise_power)) if noise_power > 0 else float(np.min(u) - 30.0)
    fits: dict[str, _Fit] = {}
    crit: dict[str, float] = {}
    for k, model in enumerate(MODELS, start=2):
        f = _fit(model, t, u, ln_n)
        if f is None:
            continue
        fits[model] = f
        crit[model] = float(_bic(f.sse, n, k))
    if not crit:
        return None
    # parsimony: a model with more parameters is taken only when it lowers BIC by more than BIC_MARGIN
    # ("very strong" evidence on the scale of Kass & Raftery 1995, JASA 90, 773-795); small systematic misfits
    # of the envelope (filter edges, the noise model) must not buy a levelling-off or a change point
    best = next(iter(crit))
    for m in crit:
        if crit[m] < crit[best] - BIC_MARGIN:
            best = m
    f = fits[best]
    if best == "flat":
        return OnsetFit(
            model=best,
            rate_per_s=0.0,
            ci95_per_s=(None, None),
            onset_s=None,
            onset_ci95_s=(None, None),
            level_off_s=None,
            log_level=float(f.q[0]),
            criterion=crit,
            n_points=n,
            params=tuple(map(float, f.q)),
        )
    cov = sandwich_cov(f.jac, f.resid)
    tq = float(special.stdtrit(max(n - len(f.q), 1), 0.975))
    lam = float(f.q[1])
    se = float(np.sqrt(max(cov[1, 1], 0.0)))
    rel = MODEL_REL_ERR + ((lam / (2.0 * band_hz)) ** 2 if band_hz else 0.0)
    half = float(np.hypot(tq * se, rel * abs(lam)))
    onset = onset_ci = None
    level_off = None
    if best != "exponential":
        onset = float(f.q[2])
        se0 = float(np.sqrt(max(cov[2, 2], 0.0)))
        onset_ci = (onset - tq * se0, onset + tq * se0)
        if best == "change-point-levelling":
            # slope d lnA/ds = λ (1 - A²/As²) falls to λ/2 where A = As/√2
            d = float(np.exp(f.q[3]))
            if lam > 0 and d > 0.5 * np.log(2.0):
                # A² = As²/2  <=>  e^{2λs} = (1 - q)/q with q = A0²/As²
                q2 = np.exp(-2.0 * d)
                level_off = onset + float(np.log((1.0 - q2) / q2)) / (2.0 * lam)
    disp, n_before = None, 0
    if onset is not None:
        before = t < onset
        # the level before the growth is seen up to the onset, or, for a line under the noise, up to where
        # the growing envelope crosses the noise level
        a2_0 = 2.0 * float(f.q[0])
        seen = onset + max(0.0, 0.5 * (ln_n - a2_0) / lam) if lam > 0 else onset
        # at least a few samples before the change point itself too (a record that grows from its start
        # has no steady part, only the first samples of an exponential)
        n_before = int(np.count_nonzero(t < seen)) if np.count_nonzero(before) >= MIN_POINTS // 2 else 0
        if n_before >= MIN_POINTS // 2:
            disp = float(np.mean(f.resid[before] ** 2))
    return OnsetFit(
        dispersion_before=disp,
        n_before=n_before,
        model=best,
        rate_per_s=lam,
        ci95_per_s=(lam - half, lam + half),
        onset_s=onset,
        onset_ci95_s=onset_ci if onset_ci is not None else (None, None),
        level_off_s=level_off,
        log_level=float(f.q[0]),
        criterion=crit,
        n_points=n,
        params=tuple(map(float, f.q)),
    )
