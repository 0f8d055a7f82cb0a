"""What the averaged spectrum hides: a line that appears only at the end, and a 1X that wanders.

* ``last_segments_spectrum``: the calibrated spectrum of the last few Welch segments only. A line that
  emerges in the last seconds of a long record is diluted in the full average (its power is divided by the
  number of segments it is absent from); on its own short average it stands out. Fewer averages mean fewer
  degrees of freedom, and the CFAR threshold of the detector follows them (F law of the Welch average).
* ``one_x_spread``: the 1X frequency per segment (Hann DFT on a fine grid near 1X, strongest bin
  interpolated), whose max - min is the speed wander over the record.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from analysis.record.spectrum import calibrated_spectrum, grandke, hann
from analysis.results import Spectrum

LAST_SEGMENTS = 3  # 50 % overlap: the last two segment lengths of the record
DRIFT_SEARCH = 0.04  # 1X searched within ±4 % of the forcing frequency per segment
MIN_LINE_RATIO = 10.0  # a segment's 1X must stand 10 dB over the floor to be measured


def last_segments_spectrum(x: np.ndarray, fs: float, spec: Spectrum) -> Spectrum | None:
    """Spectrum of the last LAST_SEGMENTS Welch segments, or None unless the record is at least four times
    longer (a shorter record dilutes a late line little, and its last look would be nearly independent of
    the full average only in name)."""
    nps = spec.nperseg
    n_last = (LAST_SEGMENTS + 1) * nps // 2
    if len(x) < 4 * n_last:
        return None
    return calibrated_spectrum(x[-n_last:], fs, nps)


def one_x_spread(x: np.ndarray, fs: float, spec: Spectrum, f1x: float) -> tuple[float | None, np.ndarray]:
    """(max - min of the per-segment 1X frequency in Hz, the per-segment frequencies); None when fewer than
    three segments show a clear 1X."""
    nps, df = spec.nperseg, spec.df_hz
    step = nps // 2
    k = 1 + (len(x) - nps) // step
    if k < 3:
        return None, np.empty(0)
    lo = max(2, int(np.floor(f1x * (1 - DRIFT_SEARCH) / df)) - 1)
    hi = min(nps // 2 - 1, int(np.ceil(f1x * (1 + DRIFT_SEARCH) / df)) + 2)
    bins = np.arange(lo, hi + 1)
    w = hann(nps)
    segs = np.lib.stride_tricks.sliding_window_view(x, nps)[::step][:k]
    pw = np.empty((k, len(bins)))
    for i in range(0, k, 8):  # a few segments at a time, as in the Welch average
        block = segs[i : i + 8]
        spec_b = sfft.rfft((block - block.mean(axis=1, keepdims=True)) * w, axis=1)[:, lo : hi + 1]
        pw[i : i + 8] = spec_b.real**2 + spec_b.imag**2
    floor = spec.floor_psd[bins] * (spec.enbw_bins * df) * (float(np.sum(w)) ** 2 / 2.0)  # |X|² units
    freqs = []
    for row in pw:
        j = int(np.argmax(row[1:-1])) + 1
        if row[j] > MIN_LINE_RATIO * floor[j]:
            f, _ = grandke(row, j, df)
            freqs.append(f + lo * df)
    if len(freqs) < 3:
        return None, np.asarray(freqs)
    f = np.asarray(freqs)
    return float(np.ptp(f)), f
