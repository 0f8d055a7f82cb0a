"""Conditioning: detrending; acceleration to velocity by band-limited frequency-domain integration."""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from .validate import TO_M_S2


def detrend(x: np.ndarray) -> np.ndarray:
    """Remove the least-squares straight line (mean and linear trend) from a record."""
    n = len(x)
    t = np.arange(n, dtype=np.float64) - (n - 1) / 2.0
    # Σt² of the centred index in closed form; Σt·x without BLAS (see spectrum.dot)
    slope = float(np.add.reduce(t * x)) / (n * (n * n - 1) / 12.0)
    return x - (float(np.mean(x)) + slope * t)


def to_m_s2(units: str) -> float:
    """Factor from the input acceleration units to m/s²."""
    return TO_M_S2[units]


def velocity_mm_s(amplitude: float | None, freq_hz: float | None, units: str) -> float | None:
    """Velocity of a sine from its acceleration amplitude: V = A/(2πf), in mm/s (same peak/RMS convention)."""
    if amplitude is None or freq_hz is None or freq_hz <= 0:
        return None
    return amplitude * to_m_s2(units) / (2.0 * np.pi * freq_hz) * 1e3


def velocity_waveform(x: np.ndarray, fs: float, units: str, band_hz: tuple[float, float]) -> np.ndarray:
    """Velocity in mm/s from acceleration, integrated in the frequency domain (divide by j2πf) with
    everything outside band_hz set to zero, so no low-frequency drift is amplified."""
    n = len(x)
    nfft = sfft.next_fast_len(n, real=True)
    spec = sfft.rfft(detrend(x), n=nfft)
    f = sfft.rfftfreq(nfft, 1.0 / fs)
    keep = (f >= band_hz[0]) & (f <= band_hz[1]) & (f > 0)
    out = np.zeros_like(spec)
    out[keep] = spec[keep] / (2j * np.pi * f[keep])
    return sfft.irfft(out, n=nfft)[:n] * (to_m_s2(units) * 1e3)


def band_velocity_rms(freqs: np.ndarray, psd: np.ndarray, units: str, band_hz: tuple[float, float]) -> float:
    """Broad-band velocity RMS in mm/s from a one-sided acceleration density:
    sqrt(Σ P_a(f_k)/(2πf_k)²·Δf) over the band (methods note §7.2)."""
    df = float(freqs[1] - freqs[0])
    keep = (freqs >= band_hz[0]) & (freqs <= band_hz[1]) & (freqs > 0)
    f = freqs[keep]
    v2 = np.sum(psd[keep] / (2.0 * np.pi * f) ** 2) * df
    return float(np.sqrt(v2)) * to_m_s2(units) * 1e3
