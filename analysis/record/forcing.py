"""Forcing frequency (1X): exact when given, refined from the spectrum when only a nominal speed is known."""

from __future__ import annotations

import numpy as np

from analysis.record.spectrum import grandke, local_peaks, power
from analysis.results import Forcing, Spectrum

SEARCH_FRACTION = 0.05  # ±5 % around the nominal speed
N_HARMONICS = 4


def _snr_near(spec: Spectrum, pw: np.ndarray, f: float, half_bins: int) -> float:
    """Largest ln(power/floor) within ±half_bins of frequency f (0 where it is off the spectrum)."""
    k = int(round(f / spec.df_hz))
    lo, hi = max(1, k - half_bins), min(len(pw) - 1, k + half_bins + 1)
    if hi <= lo:
        return 0.0
    ratio = pw[lo:hi] / np.maximum(spec.floor_psd[lo:hi] * spec.enbw_bins * spec.df_hz, 1e-300)
    return float(np.log(max(np.max(ratio), 1.0)))


def refine_forcing(spec: Spectrum, nominal_hz: float) -> Forcing:
    """Pick the 1X line within ±5 % of the nominal speed.

    Every local maximum in the window is a candidate; its score sums the log power-over-floor of the
    candidate and of its harmonics 2X..4X (searched ±(k + 1) bins to allow for the frequency error), so a
    stray line with no harmonic family loses to the true running speed. The half-order line (0.5X) and 2X
    lie outside the ±5 % window and cannot be chosen. The winner's frequency is interpolated (Grandke);
    with no line in the window the nominal speed is kept (source "nominal").
    """
    pw = power(spec)
    df = spec.df_hz
    lo = int(np.floor(nominal_hz * (1 - SEARCH_FRACTION) / df))
    hi = int(np.ceil(nominal_hz * (1 + SEARCH_FRACTION) / df)) + 1
    cands = local_peaks(pw, lo, hi)
    floor = spec.floor_psd * spec.enbw_bins * df
    cands = cands[pw[cands] > 4.0 * floor[cands]] if len(cands) else cands
    if len(cands) == 0:
        return Forcing(frequency_hz=float(nominal_hz), source="nominal", nominal_hz=float(nominal_hz))
    best, best_score = int(cands[0]), -np.inf
    for k in cands:
        f = k * df
        score = sum(_snr_near(spec, pw, h * f, h + 1) for h in range(1, N_HARMONICS + 1))
        if score > best_score:
            best, best_score = int(k), score
    f1, _ = grandke(pw, best, df)
    return Forcing(frequency_hz=float(f1), source="refined", nominal_hz=float(nominal_hz))


def line_near(
    spec: Spectrum, pw: np.ndarray, f: float, half_bins: int = 2
) -> tuple[int, float, float] | None:
    """(bin, frequency, amplitude) of the strongest local maximum within ±half_bins of f, interpolated."""
    k = int(round(f / spec.df_hz))
    peaks = local_peaks(pw, k - half_bins, k + half_bins + 1)
    if len(peaks) == 0:
        return None
    kk = int(peaks[np.argmax(pw[peaks])])
    freq, amp = grandke(pw, kk, spec.df_hz)
    return kk, freq, amp
