"""Conditioning: detrending; acceleration to velocity by band-limited frequency-domain integration."""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from analysis.record.validate import TO_M_S2


def detrend(x: np.ndarray) -> np.ndarray:
    """Remove the least-squares straight line (mean and linear trend) from a record.

    Parameters
    ----------
    x : ndarray
        One record, any units.

    Returns
    -------
    ndarray
        ``x`` minus its least-squares line, same units.
    """
    n = len(x)
    t = np.arange(n, dtype=np.float64) - (n - 1) / 2.0
    # Σt² of the centred index in closed form; Σt·x without BLAS (see spectrum.dot)
    slope = float(np.add.reduce(t * x)) / (n * (n * n - 1) / 12.0)
    return x - (float(np.mean(x)) + slope * t)


def to_m_s2(units: str) -> float:
    """Factor from the input acceleration units to m/s².

    Parameters
    ----------
    units : str
        A canonical unit name: ``"g"``, ``"m/s2"`` or ``"mm/s2"`` (see ``validate.normalize_units``).

    Returns
    -------
    float
        m/s² per input unit (g = 9.80665 m/s², standard gravity).

    Raises
    ------
    KeyError
        For a unit name that was not normalised first.
    """
    return TO_M_S2[units]


def velocity_mm_s(amplitude: float | None, freq_hz: float | None, units: str) -> float | None:
    """Velocity of a sine from its acceleration amplitude.

    Parameters
    ----------
    amplitude : float or None
        Acceleration amplitude in ``units``, peak or r.m.s.
    freq_hz : float or None
        Frequency of the sine in Hz.
    units : str
        Canonical acceleration unit of ``amplitude``.

    Returns
    -------
    float or None
        V = A / (2πf) in mm/s, in the same measure (peak stays peak, r.m.s. stays r.m.s.); ``None``
        without an amplitude or a positive frequency.

    References
    ----------
    The integration of a sine, any vibration handbook (e.g. Harris' Shock and Vibration Handbook, ch. 1).
    """
    if amplitude is None or freq_hz is None or freq_hz <= 0:
        return None
    return amplitude * to_m_s2(units) / (2.0 * np.pi * freq_hz) * 1e3


def velocity_waveform(x: np.ndarray, fs: float, units: str, band_hz: tuple[float, float]) -> np.ndarray:
    """Velocity waveform from an acceleration record, integrated in the frequency domain.

    Parameters
    ----------
    x : ndarray
        Acceleration samples in ``units``.
    fs : float
        Sample rate in Hz.
    units : str
        Canonical acceleration unit of ``x``.
    band_hz : tuple of float
        (low, high) pass band; everything outside it is set to zero so no low-frequency drift is
        amplified.

    Returns
    -------
    ndarray
        Velocity in mm/s (instantaneous values), same length as ``x``.
    """
    n = len(x)
    nfft = sfft.next_fast_len(n, real=True)
    spec = sfft.rfft(detrend(x), n=nfft)
    f = sfft.rfftfreq(nfft, 1.0 / fs)
    keep = (f >= band_hz[0]) & (f <= band_hz[1]) & (f > 0)
    out = np.zeros_like(spec)
    out[keep] = spec[keep] / (2j * np.pi * f[keep])
    return sfft.irfft(out, n=nfft)[:n] * (to_m_s2(units) * 1e3)


def band_velocity_rms(freqs: np.ndarray, psd: np.ndarray, units: str, band_hz: tuple[float, float]) -> float:
    """Broad-band velocity r.m.s. from a one-sided acceleration density.

    Parameters
    ----------
    freqs : ndarray
        Frequencies of the density in Hz, equally spaced.
    psd : ndarray
        One-sided acceleration density in units²/Hz.
    units : str
        Canonical acceleration unit of the density.
    band_hz : tuple of float
        (low, high) band of the overall level, e.g. the ISO 20816 10-1000 Hz band.

    Returns
    -------
    float
        sqrt(Σ P_a(f_k) / (2πf_k)² · Δf) over the band, velocity r.m.s. in mm/s (Parseval's relation).
    """
    df = float(freqs[1] - freqs[0])
    keep = (freqs >= band_hz[0]) & (freqs <= band_hz[1]) & (freqs > 0)
    f = freqs[keep]
    v2 = np.sum(psd[keep] / (2.0 * np.pi * f) ** 2) * df
    return float(np.sqrt(v2)) * to_m_s2(units) * 1e3
