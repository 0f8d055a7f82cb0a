"""Line or resonance bump? Keeps a noise-excited mode at 0.5X from being called a half-order line.

Below threshold a parametrically excited mode shows as a noise-excited bump centred on f_W/2 (two
Lorentzians, methods note §6.2). In a short record it can look like a line in the averaged spectrum. Two
independent tells separate them:

* **width**: a line is as wide as the window's main lobe (Hann 3-dB width 1.44 bins, Harris 1978); a bump
  whose half-power width exceeds ``WIDTH_FACTOR`` times that is resolved as a bump;
* **phase coherence across the record**: a line keeps one phase (a growing line too: only its amplitude
  changes); narrowband noise has a random complex amplitude per block (circular Gaussian, so Rayleigh
  amplitudes and wandering phase). With block amplitudes z_b at the peak frequency,
  R = max_δ |Σ z_b e^{-2πiδt_b}| / Σ |z_b| is 1 for a clean line and lower for noise. Additive noise lowers
  R for a line too, by the Rice mean: the expected R of a line with the block amplitudes seen and the
  measured floor is computed and the record is a bump when R falls clearly below it.

A rejected candidate is reported as a ``Precursor``: centre, half-power width, narrow decay rate
γ− = π·width and, where the resolution allows it, the two-Lorentzian estimate of h/h_c (analysis.modal).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sfft
from scipy import optimize, special

from analysis.record.spectrum import local_peaks, power, welch_psd
from analysis.results import Precursor, Spectrum

HANN_3DB_BINS = 1.4406  # Hann 3-dB main-lobe width in bins (Harris 1978; methods note §7.3)
WIDTH_FACTOR = 2.5  # a peak wider than 2.5x the window's 3-dB width is a resolved bump
COHERENCE_RATIO = 0.90  # R below this fraction of a line's expected R marks narrowband noise
MIN_BLOCKS = 8
NEIGHBOUR_SNR = 10.0  # a peak 10 dB over the floor near the candidate is a neighbouring line
NEIGHBOUR_BINS = 6.0  # ... kept at least 6 block-DFT bins away (Hann sidelobes below -50 dB, Harris 1978)
BLOCK_CYCLES = 20


def half_power_width_bins(pw: np.ndarray, floor: np.ndarray, k: int, max_bins: int = 24) -> float | None:
    """Full width (bins) where the floor-corrected power of the peak at bin k falls to half (interpolated)."""
    lo, hi = max(1, k - max_bins), min(len(pw) - 1, k + max_bins)
    p = pw[lo : hi + 1] - floor[lo : hi + 1]
    i = k - lo
    half = 0.5 * p[i]
    if half <= 0:
        return None
    left = i
    while left > 0 and p[left] > half:
        left -= 1
    right = i
    while right < len(p) - 1 and p[right] > half:
        right += 1
    if p[left] > half or p[right] > half:
        return None
    x1 = left + (half - p[left]) / (p[left + 1] - p[left])
    x2 = right - 1 + (p[right - 1] - half) / (p[right - 1] - p[right])
    return float(x2 - x1)


def _block_amplitudes(x: np.ndarray, fs: float, f: float, n_block: int):
    """Complex peak amplitudes of the component at f in consecutive Hann blocks: (z, centres s, ENBW Hz)."""
    k = len(x) // n_block
    w = np.hanning(n_block + 2)[1:-1]
    tt = np.arange(n_block) / fs
    ph = 2.0 * np.pi * f * tt
    scale = 2.0 / w.sum()
    blocks = x[: k * n_block].reshape(k, n_block)
    # elementwise products and sums, not a BLAS product: threaded BLAS spins on a shared machine
    z = np.add.reduce(blocks * (w * np.cos(ph) * scale), axis=1) - 1j * np.add.reduce(
        blocks * (w * np.sin(ph) * scale), axis=1
    )
    z *= np.exp(-2j * np.pi * f * (np.arange(k) * n_block / fs))  # one phase reference for all blocks
    t_b = (np.arange(k) + 0.5) * n_block / fs
    enbw_hz = fs * float(np.sum(w * w)) / float(np.sum(w)) ** 2
    return z, t_b, enbw_hz


def _rice_mean(a: np.ndarray, var: float) -> np.ndarray:
    """E|a + n| for circular complex Gaussian n with E|n|² = var (Rice distribution mean)."""
    s2 = var / 2.0
    x = -(a * a) / (2.0 * s2)
    # Laguerre L_{1/2}(x) = e^{x/2}[(1 - x) I0(-x/2) - x I1(-x/2)]; i0e/i1e absorb the exponentials
    lag = (1.0 - x) * special.i0e(-x / 2.0) - x * special.i1e(-x / 2.0)
    return math.sqrt(s2) * math.sqrt(math.pi / 2.0) * lag


def coherence(
    x: np.ndarray, fs: float, f: float, floor_psd: float, df_hz: float, block_s: float | None = None
) -> tuple[float, float]:
    """(R, R expected of a line with the same block amplitudes in the measured floor); see the module doc.

    Blocks last ``block_s`` (default BLOCK_CYCLES periods of f, at most an eighth of the record)."""
    block_s = BLOCK_CYCLES / f if block_s is None else block_s
    n_block = int(round(min(block_s, len(x) / fs / MIN_BLOCKS) * fs))
    z, t_b, enbw_hz = _block_amplitudes(x, fs, f, max(n_block, 8))
    var = 2.0 * floor_psd * enbw_hz  # E|n_b|² of the floor noise in a block (peak-amplitude scaling)
    total = float(np.sum(np.abs(z)))
    span = t_b[-1] - t_b[0] + (t_b[1] - t_b[0])
    deltas = np.arange(-0.5 * df_hz, 0.5 * df_hz + 1e-12, 0.25 / span)
    coh = np.abs(np.exp(-2j * np.pi * np.outer(deltas, t_b)) @ z)
    r = float(np.max(coh)) / max(total, 1e-300)
    a = np.sqrt(np.maximum(np.abs(z) ** 2 - var, 0.0))
    expected = float(np.sum(a)) / max(float(np.sum(_rice_mean(a, var))), 1e-300)
    return r, expected


def bump_test(x: np.ndarray, fs: float, spec: Spectrum, k: int, f: float, f1x: float) -> Precursor | None:
    """A Precursor when the peak at bin k (frequency f) is a noise-excited bump, None when it is a line."""
    pw = power(spec)
    floor = spec.floor_psd * (spec.enbw_bins * spec.df_hz)
    width = half_power_width_bins(pw, floor, k)
    wide = width is not None and width > WIDTH_FACTOR * HANN_3DB_BINS
    # blocks long enough that a neighbouring line (whirl at 0.47X, a bearing tone) stays out of them
    block_s = BLOCK_CYCLES / f
    near = local_peaks(pw, k - int(0.15 * f1x / spec.df_hz), k + int(0.15 * f1x / spec.df_hz) + 1)
    near = near[(np.abs(near - k) > 2) & (pw[near] > NEIGHBOUR_SNR * floor[near])]
    if len(near):
        block_s = max(block_s, NEIGHBOUR_BINS / (float(np.min(np.abs(near - k))) * spec.df_hz))
    r, r_line = np.nan, np.nan
    if block_s * MIN_BLOCKS <= len(x) / fs:
        r, r_line = coherence(x, fs, f, float(spec.floor_psd[k]), spec.df_hz, block_s)
    if not (wide or r < COHERENCE_RATIO * r_line):
        return None
    fine_f, fine_p, df = _fine_spectrum(x, fs, spec)
    kf = int(np.argmax(np.where(np.abs(fine_f - f) <= 2 * spec.df_hz, fine_p, 0.0)))
    fine_floor = np.interp(fine_f, spec.freqs_hz, spec.floor_psd) * (spec.enbw_bins * df)
    width_f = half_power_width_bins(fine_p, fine_floor, kf, max_bins=int(24 * spec.df_hz / df) + 1)
    resolved = width_f is not None and width_f > WIDTH_FACTOR * HANN_3DB_BINS
    if width_f is None:  # the fine spectrum is too noisy: fall back to the averaged one
        width_f, df, resolved = width, spec.df_hz, wide
    width_hz = None if width_f is None else width_f * df
    if resolved:  # the window broadens the bump: remove the main lobe in quadrature (near-Lorentzian shapes)
        width_hz = math.sqrt(max(width_hz**2 - (HANN_3DB_BINS * df) ** 2, 0.0))
        width_hz = _lorentzian_width(fine_f, fine_p, fine_f[kf], width_hz) or width_hz
    gamma = None if width_hz is None else math.pi * width_hz
    ratio = ratio_se = None
    note = ""
    if resolved:
        from analysis.physics.modal import fit_precursor

        sel = fine_f > 0
        disp = np.zeros_like(fine_p)
        disp[sel] = fine_p[sel] / (2 * math.pi * fine_f[sel]) ** 4
        try:
            span = min(max(12 * width_hz, 8 * df), 0.08 * f1x)
            fit = fit_precursor(fine_f, disp, forcing_hz=f1x, half_width_hz=span)
            if 1e-6 < fit.ratio_to_threshold_se < 0.25 and 0.0 <= fit.ratio_to_threshold < 1.0:
                ratio, ratio_se = fit.ratio_to_threshold, fit.ratio_to_threshold_se
            else:
                note = "two-Lorentzian fit not constrained by this record (h/h_c omitted)"
        except (ValueError, RuntimeError) as exc:
            note = f"two-Lorentzian fit not possible: {exc}"
    else:
        note = (
            "bump narrower than the spectral resolution: width and decay rate are upper bounds; "
            "a longer record resolves them"
        )
    if gamma is not None:
        gamma, ratio, ratio_se, note = _with_slow_flow(x, fs, f1x, gamma, ratio, ratio_se, note)
    return Precursor(
        frequency_hz=f,
        order=f / f1x,
        width_hz=width_hz,
        narrow_rate_per_s=gamma,
        ratio_to_threshold=ratio,
        ratio_to_threshold_se=ratio_se,
        coherence=r,
        line_coherence=r_line,
        resolved=resolved,
        evidence="width" if wide else "coherence",
        note=note,
    )


SLOW_FLOW_RATE_REL_SE = 0.5  # the slow flow's γ− is used when its standard error is below half of it


def _with_slow_flow(x, fs, f1x, gamma, ratio, ratio_se, note):
    """γ− from the slow flow locked to the 1X phase (analysis.slow_flow), which needs no spectral
    resolution of the bump, in place of the spectral width when it is constrained. Its h/h_c is not
    used: on 300 s records it scattered by ±0.25 about the truth with outliers (docs/analysis.md)."""
    from analysis.record.slow_flow import estimate

    try:
        flow = estimate(x, fs, f1x, gamma)
    except (ValueError, np.linalg.LinAlgError):
        flow = None
    if flow is None or not flow.narrow_rate_se < SLOW_FLOW_RATE_REL_SE * max(flow.narrow_rate_per_s, 1e-12):
        return gamma, ratio, ratio_se, note
    text = (f"decay rate from the slow flow locked to the 1X phase: {flow.narrow_rate_per_s:.3g} "
            f"± {flow.narrow_rate_se:.2g} 1/s (jackknife s.e., indicative)")
    return flow.narrow_rate_per_s, ratio, ratio_se, text if not note else f"{text}; {note}".replace(
        "width and decay rate are upper bounds", "the width is an upper bound")


def _lorentzian(f, d, fc, gamma, c):
    return d / (gamma * gamma + (2 * math.pi * (f - fc)) ** 2) + c


def _lorentzian_width(freqs: np.ndarray, pw: np.ndarray, fc: float, width0: float) -> float | None:
    """Half-power width γ/π of a least-squares Lorentzian D/(γ² + (2π(f − f_c))²) + c (relative weights)
    around the bump: less biased than half-power picking on a spectrum of few averages (methods note §6.1)."""
    span = 6.0 * width0
    sel = (np.abs(freqs - fc) <= span) & (pw > 0)
    if np.count_nonzero(sel) < 12:
        return None
    f, p = freqs[sel], pw[sel]
    g0 = math.pi * width0
    c0 = float(np.min(p))
    p0 = [(float(np.max(p)) - c0) * g0 * g0, fc, g0, c0]
    try:
        popt, _ = optimize.curve_fit(
            _lorentzian,
            f,
            p,
            p0=p0,
            sigma=p,
            maxfev=5000,
            bounds=([0, fc - width0, 1e-6, 0], [np.inf, fc + width0, 20 * g0, np.inf]),
        )
    except (RuntimeError, ValueError):
        return None
    return float(popt[2] / math.pi)


def _fine_spectrum(x: np.ndarray, fs: float, spec: Spectrum) -> tuple[np.ndarray, np.ndarray, float]:
    """A finer Welch density for the bump's shape: segments of a twelfth of the record (about 23
    averages with 50 % overlap), when that beats the main spectrum's resolution; (freqs, power, df)."""
    nps = sfft.prev_fast_len(max(len(x) // 12, 16), real=True)
    if nps <= spec.nperseg:
        return spec.freqs_hz, power(spec), spec.df_hz
    freqs, psd, _, _ = welch_psd(x, fs, nps)
    df = fs / nps
    return freqs, psd * (1.5 * df), df
