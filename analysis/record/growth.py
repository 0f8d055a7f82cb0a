"""Within-record growth rate of the subharmonic: band-pass, envelope, log-linear fit with a 95 % CI.

Steps (methods note §5.1): order-4 Butterworth band-pass around the line with zero-phase sosfiltfilt,
filter edges trimmed by 4/B, the fit window taken where the in-band SNR is at least 8 dB (pitfall P3) and
before the envelope levels off (saturation, P7), the analytic-signal envelope computed on that window
only (P1), envelope samples every 1.5/B s so they are nearly independent, then OLS of ln(envelope) on
time with a t-distribution confidence interval. The rate λ is the exponent of A(t) ∝ e^{λt} in 1/s.
When the line grows out of narrowband noise (a noise-excited mode well above the broadband floor) the
interference level is measured from the record and the fit starts 14 dB over it; the interval uses
autocorrelation-aware errors and a curvature term (analysis.growth_fit).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import scipy.fft as sfft
from scipy import signal, special

from analysis.record.growth_fit import (  # noqa: F401  (ols and hac_stderr are imported from here too)
    MIN_POINTS,
    hac_stderr,
    half_slope_gap,
    interference_power,
    log_envelope_fit,
    ols,
)
from analysis.record.growth_onset import OnsetFit, fit_onset, log_amplitude
from analysis.record.spectrum import f_isf
from analysis.results import Growth, Spectrum

BAND_ORDERS = 0.16  # default band width B in orders of 1X (0.42-0.58X), narrowed around other lines
MIN_SNR_DB = 8.0
#: over narrowband interference (a noise-excited mode that changes over seconds, not a white floor) the
#: fit starts higher: its slow amplitude wander does not average out along the window
NARROWBAND_SNR_DB = 14.0
SPACING_B = 1.5  # envelope samples every 1.5/B s
TRIM_B = 4.0  # edge trim 4/B s


@lru_cache(maxsize=64)
def bandpass_sos(lo_hz: float, hi_hz: float, fs_hz: float) -> np.ndarray:
    sos = signal.butter(4, [lo_hz, hi_hz], btype="bandpass", output="sos", fs=fs_hz)
    return sos


def growth_band(f_sub: float, f1x: float, df: float, others_hz: list[float]) -> float:
    """Band width B: BAND_ORDERS·f1x, narrowed so no other significant line lies inside (pitfall P4), but
    never below 4 spectral bins."""
    b = BAND_ORDERS * f1x
    for f in others_hz:
        gap = abs(f - f_sub)
        if gap > 1e-9 and gap - 2 * df < b / 2:
            b = min(b, 2 * (gap - 2 * df))
    return max(b, 4 * df)


def _band_noise_var(spec: Spectrum, sos: np.ndarray, lo: float, hi: float) -> float:
    """Variance of the floor noise after zero-phase filtering: Σ floor·|H|⁴·Δf near the band."""
    span = hi - lo
    sel = (spec.freqs_hz >= max(lo - span, spec.df_hz)) & (spec.freqs_hz <= hi + span)
    f = spec.freqs_hz[sel]
    if len(f) == 0:
        return 0.0
    _, h = signal.sosfreqz(sos, worN=f, fs=2 * spec.freqs_hz[-1])
    return float(np.sum(spec.floor_psd[sel] * np.abs(h) ** 4) * spec.df_hz)


def block_envelope(y: np.ndarray, n_block: int) -> np.ndarray:
    """Peak-amplitude envelope sqrt(2·mean(y²)) over consecutive blocks of n_block samples."""
    nb = len(y) // n_block
    return np.sqrt(2.0 * np.mean(y[: nb * n_block].reshape(nb, n_block) ** 2, axis=1))


def _longest_run(mask: np.ndarray) -> tuple[int, int]:
    best, start, best_span = (0, 0), None, 0
    for i, m in enumerate(np.append(mask, False)):
        if m and start is None:
            start = i
        elif not m and start is not None:
            if i - start > best_span:
                best, best_span = (start, i), i - start
            start = None
    return best


@lru_cache(maxsize=512)
def _t975(dof: int) -> float:
    return float(special.stdtrit(dof, 0.975))


@lru_cache(maxsize=512)
def _f99(dof: int) -> float:
    return f_isf(0.01, 1.0, float(dof))


def _prefix_line_sse(t: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Slope and residual sum of squares of the OLS line through the first b points, for every b."""
    b = np.arange(1, len(t) + 1, dtype=float)
    st, sy = np.cumsum(t), np.cumsum(y)
    stt, sty, syy = np.cumsum(t * t), np.cumsum(t * y), np.cumsum(y * y)
    with np.errstate(divide="ignore", invalid="ignore"):
        sxx = stt - st * st / b
        sxy = sty - st * sy / b
        syy_c = syy - sy * sy / b
        slope = np.where(sxx > 0, sxy / sxx, 0.0)
        sse = syy_c - slope * sxy
    return slope, np.maximum(sse, 0.0)


def _saturation_split(t: np.ndarray, y: np.ndarray) -> int:
    """End of the exponential stage (pitfall P7).

    Scans splits b: line on [0, b), constant on [b, n). The best split is kept only if that line rises
    and the split model beats one straight line by an F-test at the 1 % level, so a clean exponential is
    never cut; otherwise returns n.
    """
    n = len(y)
    if n <= MIN_POINTS + 3:
        return n
    slope, sse_prefix = _prefix_line_sse(t, y)
    # constant fitted to the suffix y[b:]: SSE from reversed cumulative sums
    ry, ryy = np.cumsum(y[::-1])[::-1], np.cumsum((y * y)[::-1])[::-1]
    m = np.arange(n, 0, -1, dtype=float)
    sse_suffix = ryy - ry * ry / m
    bs = np.arange(MIN_POINTS, n - 2)
    total = sse_prefix[bs - 1] + sse_suffix[bs]
    total[slope[bs - 1] <= 0] = np.inf
    i = int(np.argmin(total))
    best_sse = float(total[i])
    if not np.isfinite(best_sse):
        return n
    f_stat = (float(sse_prefix[-1]) - best_sse) / max(best_sse / (n - 4), 1e-300)
    return int(bs[i]) if f_stat > _f99(n - 4) else n


def _trim_knee(t: np.ndarray, y: np.ndarray) -> int:
    """Drop the rounded knee before a plateau: while the last points of the line fit all fall below it by
    more than their scatter, shorten the fit by one point (never below MIN_POINTS)."""
    b = len(y)
    while b > MIN_POINTS + 2:
        slope, c, _ = ols(t[:b], y[:b])
        resid = y[:b] - (c + slope * t[:b])
        scatter = float(np.std(resid[:-3])) if b > 6 else float(np.std(resid))
        tail = resid[-3:]
        if np.all(tail < 0) and float(np.mean(tail)) < -1.0 * scatter:
            b -= 1
        else:
            break
    return b


def _hilbert_envelope(
    y: np.ndarray, i0: int, i1: int, fs: float, rate0: float, margin: int
) -> tuple[int, np.ndarray]:
    """|analytic signal| of y[i0:i1] (plus margins), computed on that segment only (pitfall P1).

    The FFT-based Hilbert transform is circular, so a segment that grows by 60 dB leaks its loud end into
    its quiet start. The segment is therefore first flattened by e^{-rate0·t} (rate0 a preliminary rate),
    which keeps the dynamic range of the one FFT small; the envelope is multiplied back afterwards. For a
    slowly varying factor this is exact to first order (Bedrosian's product theorem). Returns (first
    index, envelope).
    """
    j0, j1 = max(0, i0 - margin), min(len(y), i1 + margin)
    n = sfft.next_fast_len(j1 - j0, real=True)
    extra = n - (j1 - j0)
    right = min(extra, len(y) - j1)
    j0 = max(0, j0 - (extra - right))
    j1 = j1 + right
    tt = (np.arange(j0, j1) - 0.5 * (i0 + i1)) / fs
    gain = np.exp(-rate0 * tt)
    env = np.abs(analytic(y[j0:j1] * gain, n)[: j1 - j0]) / gain
    return j0, env


def analytic(x: np.ndarray, n: int) -> np.ndarray:
    """Analytic signal x + jH{x} with an FFT of length n (as scipy.signal.hilbert, from a real FFT)."""
    spec = sfft.rfft(x, n=n)
    spec[1 : (n + 1) // 2] *= 2.0
    full = np.zeros(n, dtype=complex)
    full[: len(spec)] = spec
    return sfft.ifft(full, overwrite_x=True)


def not_estimated(note: str, band=(None, None)) -> Growth:
    return Growth(
        rate_per_s=None,
        ci95_per_s=(None, None),
        onset_s=None,
        state="not-estimated",
        intercept=None,
        fit_window_s=(None, None),
        band_hz=band,
        note=note,
    )


def band_signal(
    x: np.ndarray, fs: float, f_sub: float, b: float
) -> tuple[np.ndarray, float, float, np.ndarray]:
    lo, hi = max(f_sub - b / 2, 0.01 * fs / len(x)), min(f_sub + b / 2, 0.49 * fs)
    sos = bandpass_sos(round(lo, 9), round(hi, 9), float(fs))
    return signal.sosfiltfilt(sos, x), lo, hi, sos


def estimate_growth(
    x: np.ndarray, fs: float, f_sub: float, f1x: float, spec: Spectrum, others_hz: list[float]
) -> tuple[Growth, np.ndarray, np.ndarray]:
    """Growth of the line at f_sub; returns (Growth, envelope times, envelope) for the record chart."""
    b = growth_band(f_sub, f1x, spec.df_hz, others_hz)
    y, lo, hi, sos = band_signal(x, fs, f_sub, b)
    env_t, env = chart_envelope(y, fs, f_sub)
    n = len(x)
    trim = int(np.ceil(TRIM_B / b * fs))
    n_block = max(1, int(round(SPACING_B / b * fs)))
    if n - 2 * trim < MIN_POINTS * n_block:
        need_s = (2 * TRIM_B + MIN_POINTS * SPACING_B) / b
        return (
            not_estimated(
                f"record too short for a growth fit: needs > {need_s:.1f} s for a {b:.2f} Hz band",
                (lo, hi),
            ),
            env_t,
            env,
        )
    core = y[trim : n - trim]
    blk = block_envelope(core, n_block)
    t_blk = (trim + (np.arange(len(blk)) + 0.5) * n_block) / fs
    noise_var = _band_noise_var(spec, sos, lo, hi)
    # model comparison first (methods note §9.3): a steady line that starts growing part-way is fitted
    # by the change-point model over the whole record; the saturation guard below looks for levelling
    # off only after the onset (a steady line before it is not saturation)
    cp = _onset_fit(y, fs, trim, n_block, t_blk, blk, 2.0 * noise_var, b)
    if (
        cp is not None
        and cp.model.startswith("change-point")
        and cp.onset_s is not None
        and cp.n_before >= MIN_POINTS
        and (cp.ci95_per_s[0] or 0.0) > 0.0
    ):
        # the level before the onset is seen (not just the first few samples of an exponential record,
        # which the window fit below handles with its SNR gates)
        return _change_point_growth(cp, (lo, hi), n / fs - trim / fs, 2.0 * noise_var), env_t, env
    snr_ok = blk**2 >= 2.0 * noise_var * (1.0 + 10 ** (MIN_SNR_DB / 10))
    if cp is not None and cp.onset_s is not None:
        snr_ok &= t_blk >= cp.onset_s
    # a single block dipping below the gate between two good ones does not end the run
    bridged = snr_ok.copy()
    bridged[1:-1] |= snr_ok[:-2] & snr_ok[2:]
    r0, r1 = _longest_run(bridged)
    if r1 - r0 < MIN_POINTS:
        return (
            not_estimated(f"in-band SNR below {MIN_SNR_DB:g} dB for most of the record", (lo, hi)),
            env_t,
            env,
        )
    split = _saturation_split(t_blk[r0:r1], np.log(blk[r0:r1]))
    levelled = split < r1 - r0
    if levelled:
        split = _trim_knee(t_blk[r0 : r0 + split], np.log(blk[r0 : r0 + split]))
    r1 = r0 + split
    # the line may grow out of narrowband noise (a noise-excited mode, methods note §6.2) that lies well
    # above the broadband floor: measure the in-band interference from the record itself (pitfall P3)
    interference = interference_power(t_blk[:r1], blk[:r1] ** 2)
    noise_power = max(2.0 * noise_var, interference)
    if interference > 2.0 * noise_var:
        ok = blk[:r1] ** 2 >= noise_power * (1.0 + 10 ** (NARROWBAND_SNR_DB / 10))
        ok[1:-1] |= ok[:-2] & ok[2:]
        q0, q1 = _longest_run(np.append(ok, False)[:r1])
        if q1 == r1 and q1 - q0 >= MIN_POINTS:
            r0 = max(r0, q0)
    i0, i1 = trim + r0 * n_block, trim + r1 * n_block
    rate0 = ols(t_blk[r0:r1], np.log(blk[r0:r1]))[0]
    first, henv = _hilbert_envelope(y, i0, i1, fs, float(rate0), int(np.ceil(2.0 / b * fs)))
    idx = np.arange(i0 + n_block // 2, i1, n_block)
    t = idx / fs
    e = henv[idx - first]
    good = e > 0
    t, e = t[good], e[good]
    if len(t) < MIN_POINTS:
        return not_estimated("too few envelope points above the noise for a fit", (lo, hi)), env_t, env
    slope, intercept, stderr, ln_a = log_envelope_fit(t, e, noise_power)
    if slope > 0 and noise_power > 0:
        # start where the fitted line, not the noisy data, passes the SNR gate: blocks that passed the gate
        # early because noise lifted them would bias the start high and the rate low (selection bias)
        gate_db = NARROWBAND_SNR_DB if noise_power > 2.0 * noise_var else MIN_SNR_DB
        t_gate = (0.5 * np.log(noise_power * 10 ** ((gate_db + 6.0) / 10)) - intercept) / slope
        keep = t >= t_gate
        if MIN_POINTS <= np.count_nonzero(keep) < len(t):
            t, e = t[keep], e[keep]
            i0 = int(round(t[0] * fs)) - n_block // 2
            slope, intercept, stderr, ln_a = log_envelope_fit(t, e, noise_power)
    stderr = max(stderr, hac_stderr(t, ln_a - intercept - slope * t))
    stderr = float(np.hypot(stderr, 0.5 * half_slope_gap(t, ln_a)))
    half = _t975(len(t) - 2) * stderr
    ci = (slope - half, slope + half)
    state = "growing" if ci[0] > 0 else "decaying" if ci[1] < 0 else "steady"
    onset = None
    if state == "growing":
        t_cross = (0.5 * np.log(noise_power) - intercept) / slope if noise_power > 0 else -1.0
        onset = float(t_cross) if 0.0 <= t_cross <= n / fs else None
    g = Growth(
        rate_per_s=float(slope),
        ci95_per_s=(float(ci[0]), float(ci[1])),
        onset_s=onset,
        state=state,
        intercept=float(intercept),
        fit_window_s=(i0 / fs, i1 / fs),
        band_hz=(lo, hi),
        n_points=len(t),
        note="envelope levels off after the fit window" if levelled else "",
        end_amplitude=float(np.exp(intercept + slope * i1 / fs)),
        model="exponential",
    )
    return g, env_t, env


def _onset_fit(
    y: np.ndarray,
    fs: float,
    trim: int,
    n_block: int,
    t_blk: np.ndarray,
    blk: np.ndarray,
    noise_power: float,
    band_hz: float,
) -> OnsetFit | None:
    """Envelope samples every 1.5/B s over the trimmed record and the BIC choice of model.

    The analytic signal is taken of the band signal divided by its block envelope (interpolated in log),
    so one FFT holds a small dynamic range (pitfall P1); the envelope is multiplied back afterwards.
    """
    if len(blk) < 16 or np.any(blk <= 0):
        return None
    t = np.arange(len(y)) / fs
    gain = np.exp(-np.interp(t, t_blk, np.log(blk)))
    n_fft = sfft.next_fast_len(len(y), real=True)
    env = np.abs(analytic(y * gain, n_fft)[: len(y)]) / gain
    idx = np.arange(trim + n_block // 2, len(y) - trim, n_block)
    e = env[idx]
    # the spectrum's floor near a strong growing line is lifted by the line's own spread (a non-stationary
    # line is not one bin wide); the quietest stretch of the record bounds the band noise from above:
    # |z|² of band noise alone is exponential, median N·ln 2
    w = MIN_POINTS + 2
    if len(e) >= 2 * w:
        runs = np.median(np.lib.stride_tricks.sliding_window_view(e * e, w), axis=1)
        noise_power = min(noise_power, float(np.min(runs)) / np.log(2.0)) if noise_power > 0 else noise_power
    return fit_onset(idx / fs, e, noise_power, band_hz)


def _change_point_growth(cp: OnsetFit, band: tuple[float, float], t_end: float, noise_power: float) -> Growth:
    """Growth result of a change-point model: the rate after the onset, its interval, the onset.

    With a steady line at least MIN_SNR_DB over the band noise before it, the onset is the change point
    (with its interval); a line that grows out of the noise has no visible change point, and its onset is
    where the fitted envelope crosses the noise level (as for the exponential fit)."""
    lam = float(cp.rate_per_s or 0.0)
    lo, hi = cp.ci95_per_s
    assert lo is not None and hi is not None and cp.onset_s is not None
    state = "growing" if lo > 0 else "decaying" if hi < 0 else "steady"
    end = cp.level_off_s if cp.level_off_s is not None and cp.level_off_s < t_end else t_end
    steady_line = noise_power <= 0 or 2.0 * cp.log_level >= np.log(noise_power * 10 ** (MIN_SNR_DB / 10))
    onset, onset_ci = float(cp.onset_s), cp.onset_ci95_s
    start = onset
    note = "steady line, then growth from the onset"
    if not steady_line:
        onset = cp.onset_s + (0.5 * np.log(noise_power) - cp.log_level) / lam if lam > 0 else cp.onset_s
        onset_ci = (None, None)
        start = max(float(onset), float(cp.onset_s))
        note = "grows out of the noise"
    if cp.model == "change-point-levelling":
        note += "; the envelope levels off"
    return Growth(
        rate_per_s=lam,
        ci95_per_s=(float(lo), float(hi)),
        onset_s=float(onset),
        state=state,
        intercept=float(cp.log_level - lam * cp.onset_s),
        fit_window_s=(float(start), float(end)),
        band_hz=band,
        n_points=cp.n_points,
        note=note,
        end_amplitude=float(np.exp(log_amplitude(cp, np.array([end]))[0])),
        model=cp.model,
        onset_ci95_s=onset_ci,
        level_off_s=cp.level_off_s,
    )


def chart_envelope(
    y: np.ndarray, fs: float, f_sub: float, max_points: int = 2000
) -> tuple[np.ndarray, np.ndarray]:
    """Block envelope of the band signal for the record page: blocks of at least one period of the line."""
    n_block = max(int(round(fs / f_sub)), int(np.ceil(len(y) / max_points)), 1)
    env = block_envelope(y, n_block)
    t = (np.arange(len(env)) + 0.5) * n_block / fs
    return t, env
