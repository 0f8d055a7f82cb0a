"""How far below threshold a noise-excited mode at 0.5X runs, from the slow flow of the record.

Below threshold a mode of natural frequency f0 near f_W/2, parametrically modulated at f_W and driven by
broadband noise, is a two-dimensional Ornstein-Uhlenbeck process in the frame that turns at half the
forcing phase. First-order averaging of x'' + 2ζω0 x' + ω0²(1 + h cos Ωt) x = noise with Ω = 2π f_W gives
the quadratures q = (u, v) of x = u cos(Ωt/2) + v sin(Ωt/2) as

    q' = M q + noise,   M = R [[-μ + s, -σ], [σ, -μ - s]] Rᵀ,

with μ = ζω0 the damping rate, s = hω0/4 the modulation strength, σ = Ω/2 − ω0 the detuning and R a
rotation set by the phase of the forcing (Nayfeh & Mook 1979, *Nonlinear Oscillations*, §5.7;
stochastic averaging: Roberts & Spanos 1986, *Int. J. Non-Linear Mech.* 21(2)). μ, s and σ do not depend
on R: μ = −tr M / 2, s = |traceless symmetric part|, σ = antisymmetric part. The mode is unstable when
s² > μ² + σ², so the distance to threshold is

    h / h_c = s / √(μ² + σ²),   decay rates γ∓ = μ ∓ √(s² − σ²) (γ∓ = μ when s < |σ|).

The estimate needs no spectral resolution of the bump (a record of a few tens of 1/γ− suffices), and no
model of the noise level: for lags τ > 0 the covariance of a stationary linear process is
C(τ) = expm(Mτ) C(0) (Gardiner, *Handbook of Stochastic Methods*, §4.4.6), and white measurement noise,
band-limited and sampled at the Nyquist rate of its band, adds nothing at lags of one sample or more.
So the quadratures are obtained by demodulating the record with half the phase of its own 1X (forcing)
line, band-limited to ``B`` and sampled at 2B; M and C(0) are fitted by least squares to C(kΔ),
k = 1..K; the standard errors are the delete-one-block jackknife over ``BLOCKS`` blocks of the record
(Künsch 1989, *Ann. Statist.* 17(3)).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
from scipy import optimize

BLOCKS = 8  # jackknife blocks
MIN_RATE_SPANS = 20.0  # the record must last at least this many 1/γ− for an estimate
PHASE_BAND = 0.03  # the forcing line is isolated within ±3 % of its frequency for its phase


@dataclass(frozen=True)
class SlowFlow:
    """Averaged slow-flow estimate of a noise-excited mode near 0.5X (rates in 1/s)."""

    damping_rate_per_s: float  # μ = ζω0
    modulation_rate_per_s: float  # s = hω0/4
    detuning_rad_s: float  # σ = Ω/2 − ω0 (positive: the mode lies below 0.5X)
    ratio_to_threshold: float  # h/h_c = s / √(μ² + σ²)
    ratio_to_threshold_se: float
    narrow_rate_per_s: float  # γ−
    narrow_rate_se: float
    lags: int
    step_s: float

    def mode_hz_for(self, forcing_hz: float) -> float:
        """f0 implied by the detuning for a forcing at ``forcing_hz``: f_W/2 − σ/2π."""
        return forcing_hz / 2.0 - self.detuning_rad_s / (2.0 * math.pi)


def forcing_phase(x: np.ndarray, fs: float, forcing_hz: float) -> np.ndarray:
    """Unwrapped phase (rad) of the line at ``forcing_hz``: the analytic signal of the record band-limited
    to ±PHASE_BAND of it (Hilbert transform by FFT; Bendat & Piersol, *Random Data*, §13.1)."""
    n = len(x)
    spec = np.fft.rfft(x)
    f = np.fft.rfftfreq(n, 1.0 / fs)
    band = max(PHASE_BAND * forcing_hz, 4.0 * fs / n)
    full = np.zeros(n, dtype=complex)
    sel = np.abs(f - forcing_hz) <= band
    full[: len(spec)][sel] = 2.0 * spec[sel]
    return np.unwrap(np.angle(np.fft.ifft(full)))


def quadratures(x: np.ndarray, fs: float, forcing_hz: float, band_hz: float) -> tuple[np.ndarray, float]:
    """(2 × n quadratures in the frame at half the forcing phase, sample step s), band-limited to
    ±``band_hz`` and sampled at 2·band_hz."""
    ph = forcing_phase(x, fs, forcing_hz)
    y = np.asarray(x, dtype=float) * np.exp(-0.5j * ph)
    spec = np.fft.fft(y)
    spec[np.abs(np.fft.fftfreq(len(y), 1.0 / fs)) > band_hz] = 0.0
    step = max(1, int(fs / (2.0 * band_hz)))
    z = np.fft.ifft(spec)[::step]
    return np.vstack([z.real, -z.imag]), step / fs


def _lag_sums(q: np.ndarray, lags: int, blocks: int) -> tuple[np.ndarray, np.ndarray]:
    """Per block b: sums S[b, k] = Σ_t q(t + k) q(t)ᵀ over t in block b, and counts N[b, k]."""
    n = q.shape[1]
    edges = np.linspace(0, n - lags, blocks + 1).astype(int)
    sums = np.zeros((blocks, lags + 1, 2, 2))
    counts = np.zeros((blocks, lags + 1))
    for b in range(blocks):
        lo, hi = edges[b], edges[b + 1]
        for k in range(lags + 1):
            a, c = q[:, lo + k : hi + k], q[:, lo:hi]
            sums[b, k] = a @ c.T
            counts[b, k] = hi - lo
    return sums, counts


def _propagators(p: np.ndarray, step: float, lags: int) -> np.ndarray:
    """expm(M k step) for k = 1..lags, as powers of expm(M step)."""
    mu, s1, s2, sg = p[:4]
    one = sla.expm(np.array([[-mu + s1, s2 - sg], [s2 + sg, -mu - s1]]) * step)
    out = np.empty((lags, 2, 2))
    out[0] = one
    for k in range(1, lags):
        out[k] = out[k - 1] @ one
    return out


def _fit(cov: np.ndarray, step: float, start: np.ndarray | None = None) -> np.ndarray:
    """(μ, s1, s2, σ, C0) of M fitted to C(k·step) = expm(M k step) C0, k = 1..K (least squares)."""
    lags = cov.shape[0] - 1
    scale = max(float(np.trace(cov[1])) / 2.0, 1e-300)
    target = cov[1:] / scale

    def resid(p):
        c0 = np.array([[p[4], p[5]], [p[5], p[6]]])
        return (_propagators(p, step, lags) @ c0 - target).ravel()

    span = lags * step
    starts = [start] if start is not None else [
        np.array([mu0, f * mu0, 0.0, 0.0, 1.0, 0.0, 1.0])
        for mu0 in (0.5 / span, 1.5 / span, 5.0 / span, 0.3 / step) for f in (0.0, 0.8)]
    best = None
    for p0 in starts:
        try:
            r = optimize.least_squares(resid, p0, bounds=([1e-6, -1e3, -1e3, -1e3, 0.0, -1e3, 0.0],
                                                          [1e3, 1e3, 1e3, 1e3, 1e3, 1e3, 1e3]))
        except (ValueError, np.linalg.LinAlgError):
            continue
        if best is None or r.cost < best.cost:
            best = r
    if best is None:
        raise ValueError("slow-flow fit failed")
    return best.x


def _derived(p: np.ndarray) -> tuple[float, float, float, float, float]:
    mu, s1, s2, sg = (float(v) for v in p[:4])
    s = math.hypot(s1, s2)
    ratio = s / math.hypot(mu, sg)
    narrow = mu - math.sqrt(max(s * s - sg * sg, 0.0))
    return mu, s, sg, ratio, narrow


def estimate(x: np.ndarray, fs: float, forcing_hz: float, rate_guess_per_s: float,
             *, band_hz: float | None = None) -> SlowFlow | None:
    """The slow-flow estimate of the mode near ``forcing_hz``/2, or None when the record is too short
    (under MIN_RATE_SPANS / γ) or the fit is not constrained.

    Parameters
    ----------
    x, fs : the record (any units) and its sample rate (Hz).
    forcing_hz : the forcing (1X) frequency; its line must be present in the record (its phase is used).
    rate_guess_per_s : a rough decay rate of the bump (e.g. π × its half-power width): sets the band
        (15 γ/2π, at least 0.5 Hz), the sample step (1 / 2 band) and the lags fitted (up to 1/γ).
    """
    dur = len(x) / fs
    g = max(float(rate_guess_per_s), 1e-6)
    if dur * g < MIN_RATE_SPANS or not np.isfinite(g):
        return None
    # the band holds the broad quadrature too (γ+ up to a few times γ−); lags span about 1/γ
    band = band_hz or min(max(15.0 * g / (2.0 * math.pi), 0.5), 0.25 * forcing_hz)
    q, step = quadratures(x, fs, forcing_hz, band)
    lags = int(np.clip(round(1.0 / (g * step)), 6, 120))
    if q.shape[1] < 10 * lags:
        return None
    sums, counts = _lag_sums(q, lags, BLOCKS)
    p_full = _fit(sums.sum(0) / counts.sum(0)[:, None, None], step)
    full = _derived(p_full)
    jack = []
    for b in range(BLOCKS):
        keep = np.arange(BLOCKS) != b
        try:
            jack.append(_derived(_fit(sums[keep].sum(0) / counts[keep].sum(0)[:, None, None], step, p_full)))
        except ValueError:
            return None
    j = np.array(jack)
    se = np.sqrt((BLOCKS - 1) / BLOCKS * np.sum((j - j.mean(0)) ** 2, axis=0))
    mu, s, sg, ratio, narrow = full
    if not (np.isfinite(se[3]) and np.isfinite(ratio)) or mu <= 0:
        return None
    return SlowFlow(mu, s, sg, ratio, float(se[3]), narrow, float(se[4]), lags, step)
