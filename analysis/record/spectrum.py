"""Calibrated Welch spectrum (Hann, 50 % overlap), interpolated peaks, robust noise floor, CFAR thresholds.

Calibration: the Hann window's coherent gain (0.5) is divided out, so the one-sided amplitude spectrum of a
sine of peak amplitude A reads A at a bin-centred frequency; the density ``psd`` integrates to the variance
(Parseval). Figures of merit of the periodic Hann window: CG 0.5, ENBW 1.5 bins (Harris 1978, Proc. IEEE
66(1)).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import scipy.fft as sfft
from scipy import special

from analysis.results import Spectrum

_CHUNK_SEGMENTS = 8  # segments transformed at once: bounds the working memory to ~8 segments


@lru_cache(maxsize=32)
def hann(n: int) -> np.ndarray:
    """Periodic Hann window of length n (the spectral-analysis form, as scipy.signal.get_window)."""
    w = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)
    w.setflags(write=False)
    return w


def dot(a: np.ndarray, b: np.ndarray) -> float:
    """Σ a·b without BLAS: a threaded BLAS dot of a long vector spins its threads, which costs more than the
    arithmetic on a shared machine."""
    return float(np.add.reduce(a * b))


def window_figures(w: np.ndarray) -> tuple[float, float]:
    """Coherent gain Σw/N and equivalent noise bandwidth N·Σw²/(Σw)² in bins."""
    n = len(w)
    s1 = float(np.sum(w))
    return s1 / n, n * float(np.sum(w * w)) / (s1 * s1)


def welch_nu_eff(w: np.ndarray, step: int, n_segments: int) -> float:
    """Equivalent degrees of freedom of a Welch average of overlapped segments (Welch 1967):
    ν = 2K / (1 + 2 Σ_{j=1}^{K-1} (1 - j/K) ρ(j)²), ρ(j) = Σ w[n] w[n + jD] / Σ w²."""
    k = n_segments
    if k <= 1:
        return 2.0
    n = len(w)
    e = dot(w, w)
    acc = 0.0
    for j in range(1, k):
        lag = j * step
        if lag >= n:
            break
        rho = dot(w[: n - lag], w[lag:]) / e
        acc += (1.0 - j / k) * rho * rho
    return 2.0 * k / (1.0 + 2.0 * acc)


@lru_cache(maxsize=64)
def _hann_nu_eff(nperseg: int, step: int, k: int) -> float:
    return welch_nu_eff(hann(nperseg), step, k)


def welch_psd(x: np.ndarray, fs: float, nperseg: int) -> tuple[np.ndarray, np.ndarray, int, float]:
    """One-sided Welch density (Hann, 50 % overlap, mean removed per segment).

    Returns (freqs, psd, n_segments, nu_eff). Segments are transformed a few at a time so the working
    memory stays near that of eight segments whatever the record length.
    """
    n = len(x)
    nperseg = min(nperseg, n)
    step = nperseg // 2
    k = 1 + (n - nperseg) // step
    w = hann(nperseg)
    scale = 1.0 / (fs * dot(w, w))
    acc = np.zeros(nperseg // 2 + 1)
    segs = np.lib.stride_tricks.sliding_window_view(x, nperseg)[::step][:k]
    for i in range(0, k, _CHUNK_SEGMENTS):
        block = segs[i : i + _CHUNK_SEGMENTS]
        block = (block - block.mean(axis=1, keepdims=True)) * w
        spec = sfft.rfft(block, axis=1)
        acc += np.sum(spec.real**2 + spec.imag**2, axis=0)
    psd = acc * (scale / k)
    if nperseg % 2 == 0:
        psd[1:-1] *= 2.0
    else:
        psd[1:] *= 2.0
    freqs = np.arange(len(psd)) * (fs / nperseg)
    return freqs, psd, k, _hann_nu_eff(nperseg, step, k)


def f_isf(p: float, d1: float, d2: float) -> float:
    """Upper-tail quantile of the F(d1, d2) distribution, accurate for small p: if X ~ F(d1, d2) then
    d2/(d2 + d1·X) ~ Beta(d2/2, d1/2), so x = (d2/d1)·(1/I⁻¹_p(d2/2, d1/2) − 1)."""
    b = float(special.betaincinv(d2 / 2.0, d1 / 2.0, p))
    return (d2 / d1) * (1.0 / b - 1.0)


@lru_cache(maxsize=256)
def _chi2_median_over_mean(nu: float) -> float:
    return 2.0 * float(special.gammaincinv(nu / 2.0, 0.5)) / nu  # median of χ²_ν over its mean ν


def robust_floor(psd: np.ndarray, nu: float, block: int = 32) -> np.ndarray:
    """Local noise floor (mean-equivalent density) that ignores spectral lines.

    Medians over blocks of ``block`` bins, scaled by ν/median(χ²_ν) so a noise-only bin has the floor as its
    mean (median/mean of χ²_ν/ν: methods note §8.1), interpolated to every bin.
    """
    n = len(psd)
    nb = max(1, n // block)
    used = psd[: nb * block].reshape(nb, block)
    med = np.median(used, axis=1) / _chi2_median_over_mean(round(nu, 6))
    centres = (np.arange(nb) + 0.5) * block
    return np.interp(np.arange(n), centres, med)


def grandke(power: np.ndarray, k: int, df: float) -> tuple[float, float]:
    """Frequency and peak amplitude of a tone at local-maximum bin k of a Hann power spectrum.

    ``power`` is the "spectrum"-scaled power (A²/2 for a bin-centred sine). Grandke (1983) ratio:
    α = |X_{k±1}|/|X_k| with the larger neighbour, δ = ±(2α − 1)/(α + 1),
    A = |X_k|·πδ(1 − δ²)/sin(πδ).
    """
    if k <= 0 or k >= len(power) - 1 or power[k] <= 0:
        return k * df, float(np.sqrt(2.0 * max(power[k], 0.0)))
    left, right = power[k - 1], power[k + 1]
    sign = 1.0 if right >= left else -1.0
    alpha = float(np.sqrt(max(right, left) / power[k]))
    delta = (2.0 * alpha - 1.0) / (alpha + 1.0)
    delta = min(max(delta, 0.0), 0.999)
    corr = 1.0 if delta < 1e-9 else np.pi * delta * (1.0 - delta * delta) / np.sin(np.pi * delta)
    return (k + sign * delta) * df, float(np.sqrt(2.0 * power[k]) * corr)


@lru_cache(maxsize=256)
def cfar_threshold(pfa_total: float, n_tested: int, nu: float, nu_ref: float) -> float:
    """Power-ratio threshold τ over the estimated floor for a family-wise false-alarm probability.

    Per-bin Pfa = 1 − (1 − Pfa_total)^(1/N_test) (methods note §8.1). The test bin is χ²_ν/ν; the floor
    estimate carries its own scatter, modelled as χ²_{ν_ref}/ν_ref, so the ratio is F(ν, ν_ref)
    (cell-averaging CFAR).
    """
    n_tested = max(1, int(n_tested))
    pfa_bin = -np.expm1(np.log1p(-pfa_total) / n_tested)
    return f_isf(pfa_bin, nu, nu_ref)


def calibrated_spectrum(x: np.ndarray, fs: float, nperseg: int) -> Spectrum:
    freqs, psd, k, nu = welch_psd(x, fs, nperseg)
    nps = min(nperseg, len(x))
    _, enbw = window_figures(hann(nps))
    df = fs / nps
    amplitude = np.sqrt(2.0 * psd * enbw * df)
    floor = robust_floor(psd, nu)
    for a in (freqs, psd, amplitude, floor):
        a.setflags(write=False)
    return Spectrum(
        freqs_hz=freqs,
        amplitude=amplitude,
        psd=psd,
        floor_psd=floor,
        df_hz=df,
        nperseg=nps,
        n_segments=k,
        nu_eff=nu,
        enbw_bins=enbw,
    )


def power(spec: Spectrum) -> np.ndarray:
    """ "Spectrum"-scaled power (A²/2 for a bin-centred sine) from the density."""
    return spec.psd * (spec.enbw_bins * spec.df_hz)


def local_peaks(values: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Indices of strict local maxima in values[lo:hi] (bins lo..hi-1)."""
    lo = max(lo, 1)
    hi = min(hi, len(values) - 1)
    if hi <= lo:
        return np.empty(0, dtype=np.intp)
    mid = values[lo:hi]
    is_peak = (mid > values[lo - 1 : hi - 1]) & (mid >= values[lo + 1 : hi + 1])
    return np.flatnonzero(is_peak) + lo


#: the shortest reading analysed, in cycles of 1X: one segment then resolves 1/16 of an order (Hann main
#: lobe ±2 bins = ±0.125 orders), enough to tell 0.5X from 1X and to measure a line's order to a fraction
#: of that by interpolation (issue 12: route collectors take 1-4 s readings)
MIN_CYCLES = 16


def min_samples(fs: float, f1x: float) -> int:
    """The fewest samples analysed at 1X = f1x: ``MIN_CYCLES`` cycles."""
    return int(np.ceil(fs * MIN_CYCLES / f1x))


def choose_nperseg(n: int, fs: float, f1x: float) -> tuple[int, bool]:
    """Segment length for a forcing frequency f1x: returns (nperseg, resolution_ok).

    Target resolution Δf = f1x/200 so whirl at 0.48X sits 4 bins from 0.5X (Hann main lobe ±2 bins) and
    the ±2 % half-order window is ±2 bins wide, with ≥ 8 averages; a shorter record keeps 8 averages at a
    coarser resolution down to Δf = f1x/50 (0.5X and 1X 25 bins apart), then fewer averages; a shorter
    reading of at least ``MIN_CYCLES`` cycles is one segment of the whole record. Less -> 0 (the caller
    raises).
    """
    fine = int(np.ceil(fs * 200.0 / f1x))
    coarse = int(np.ceil(fs * 50.0 / f1x))
    if n < coarse:  # a short reading: one segment of the whole record, down to MIN_CYCLES cycles of 1X
        return (n, False) if n >= min_samples(fs, f1x) else (0, False)
    fast = sfft.next_fast_len(fine, real=True)
    if n >= 4.5 * fast:
        return fast, True
    coarse_fast = sfft.next_fast_len(coarse, real=True)
    coarse = coarse_fast if coarse_fast <= n else coarse
    nps = max(sfft.prev_fast_len(max(int(n / 4.5), coarse), real=True), coarse)
    return min(nps, n), nps >= fine
