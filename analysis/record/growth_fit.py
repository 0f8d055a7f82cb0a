"""Log-linear fit of the growth envelope and its honest interval (methods note §5.1, §5.4).

OLS of ln A(t) with the larger of the classical, HC3 and Newey-West standard errors, the E1 correction of
the log-envelope in band noise, a split-half curvature term, and the in-band interference level under a
line that grows out of narrowband noise. Used by analysis.growth.
"""

from __future__ import annotations

import numpy as np
from scipy import special

MIN_POINTS = 6


def ols(t: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """Ordinary least squares y = c + λt: returns (λ, c, standard error of λ).

    The standard error is the larger of the classical one and the HC3 heteroscedasticity-consistent one
    (MacKinnon & White 1985): the log-envelope scatters most where the line is weakest, at the start of a
    growing record, and the classical formula would then claim too narrow an interval.
    """
    n = len(t)
    tm, ym = float(t.mean()), float(y.mean())
    dt, dy = t - tm, y - ym
    sxx = float(np.dot(dt, dt))
    slope = float(np.dot(dt, dy)) / sxx
    resid = dy - slope * dt
    var_classic = float(np.dot(resid, resid)) / max(n - 2, 1) / sxx
    lev = 1.0 / n + dt * dt / sxx
    var_hc3 = float(np.sum((dt * resid / (1.0 - np.minimum(lev, 0.999))) ** 2)) / (sxx * sxx)
    return slope, ym - slope * tm, float(np.sqrt(max(var_classic, var_hc3)))


def log_envelope_fit(
    t: np.ndarray, e: np.ndarray, noise_power: float
) -> tuple[float, float, float, np.ndarray]:
    """OLS of ln A(t) from envelope samples |z| of a line in circular Gaussian band noise of power N.

    E[ln|z|²] = ln A² + E1(A²/N) exactly (|z|²/N is non-central χ² with 2 d.o.f.), so the log-envelope
    is corrected by E1 of the fitted SNR (two passes), which is nearly zero above 8 dB. Subtracting N
    from |z|² before the log (pitfall P3) would instead bias the weak early points low, and the rate high.
    Returns (λ, c, standard error of λ, corrected ln A).
    """
    ln_z2 = 2.0 * np.log(e)
    ln_a = 0.5 * ln_z2
    slope, intercept, stderr = ols(t, ln_a)
    if noise_power > 0:
        for _ in range(2):
            rho = np.exp(2.0 * (intercept + slope * t)) / noise_power
            ln_a = 0.5 * (ln_z2 - special.exp1(np.maximum(rho, 1e-3)))
            slope, intercept, stderr = ols(t, ln_a)
    return slope, intercept, stderr, ln_a


def half_slope_gap(t: np.ndarray, y: np.ndarray) -> float:
    """|slope of the first half - slope of the second half|: curvature the straight line cannot follow
    (saturation setting in, the decaying Floquet companion), added to the interval as model error."""
    h = len(t) // 2
    if h < MIN_POINTS // 2 + 2:
        return 0.0
    return abs(ols(t[:h], y[:h])[0] - ols(t[h:], y[h:])[0])


def hac_stderr(t: np.ndarray, resid: np.ndarray) -> float:
    """Newey-West (1987) standard error of an OLS slope with Bartlett weights.

    The envelope of a line growing out of narrowband noise has residuals correlated over the noise's
    coherence time, far beyond the 1.5/B spacing (methods note §5.4); the lag window is the larger of
    the usual rule 4(n/100)^(2/9) and three times the lag where the residual autocorrelation first falls
    below 0.1 (the Bartlett weights underweight a short window), at most n/4.
    """
    n = len(t)
    dt = t - t.mean()
    u = dt * resid
    r = resid - resid.mean()
    var0 = float(np.dot(r, r))
    lags = int(np.floor(4.0 * (n / 100.0) ** (2.0 / 9.0)))
    if var0 > 0:
        acf = np.correlate(r, r, mode="full")[n - 1 : n - 1 + n // 4 + 1] / var0
        below = np.flatnonzero(acf < 0.1)
        lags = max(lags, 3 * int(below[0]) if len(below) else n // 4)
    lags = min(lags, n // 4)
    s = float(np.dot(u, u))
    for j in range(1, lags + 1):
        s += 2.0 * (1.0 - j / (lags + 1)) * float(np.dot(u[j:], u[:-j]))
    sxx = float(np.dot(dt, dt))
    return float(np.sqrt(max(s, 0.0)) / sxx) * np.sqrt(n / max(n - 2, 1))


def interference_power(t: np.ndarray, p: np.ndarray) -> float:
    """In-band power under the growing line: fit ln p = ln(N + e^{c + 2λt}) to the block powers p up to the
    end of the exponential stage (least squares in the log domain); returns N (0 when not determined)."""
    from scipy.optimize import least_squares

    if len(p) < MIN_POINTS + 2 or np.any(p <= 0):
        return 0.0
    lp = np.log(p)
    head = max(3, len(p) // 8)
    n0 = float(np.median(p[:head]))
    slope0 = max(float(np.polyfit(t[-2 * head :], lp[-2 * head :], 1)[0]), 1e-6)
    c0 = float(lp[-1] - slope0 * t[-1])

    def resid(q):
        return np.logaddexp(q[0], q[1] + q[2] * t) - lp

    def jac(q):
        share = 1.0 / (1.0 + np.exp(np.clip(q[1] + q[2] * t - q[0], -700.0, 700.0)))  # ∂/∂q0
        return np.column_stack((share, 1.0 - share, (1.0 - share) * t))

    try:
        fit = least_squares(resid, [np.log(n0), c0, slope0], jac=jac, method="lm", max_nfev=200)
    except ValueError:
        return 0.0
    ln_n, _, slope = fit.x
    if not fit.success or slope <= 0:
        return 0.0
    # N is determined only when the record shows blocks at the interference level before the growth
    crossing = (ln_n - fit.x[1]) / slope
    return float(np.exp(ln_n)) if crossing > t[0] + (t[1] - t[0]) else 0.0
