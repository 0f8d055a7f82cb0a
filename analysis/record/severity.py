"""Severity: overall velocity RMS, ISO 20816 evaluation zone, waveform statistics of the acceleration."""

from __future__ import annotations

import math

import numpy as np

from analysis.errors import SignalError
from analysis.record.spectrum import dot
from analysis.results import Waveform

ZONE_STANDARD = "ISO 10816-3:2009 / ISO 20816-3:2022 Annex A (values from memory; check against the standard)"

#: Zone boundaries A/B, B/C, C/D of broad-band velocity RMS in mm/s, by machine group and support.
#: Values from memory (ISO 10816-3:2009, carried over in ISO 20816-3:2022 Annex A); verify against the
#: purchased standard before relying on them.
ZONE_LIMITS_MM_S: dict[tuple[int, str], tuple[float, float, float]] = {
    (1, "rigid"): (2.3, 4.5, 7.1),
    (1, "flexible"): (3.5, 7.1, 11.0),
    (2, "rigid"): (1.4, 2.8, 4.5),
    (2, "flexible"): (2.3, 4.5, 7.1),
}


def zone_limits(machine_group: int, foundation: str) -> tuple[float, float, float]:
    """ISO 20816 zone boundaries for a machine group and support.

    Parameters
    ----------
    machine_group : int
        1 (large machines, 300 kW-50 MW) or 2 (medium machines, 15-300 kW).
    foundation : str
        ``"rigid"`` or ``"flexible"`` support.

    Returns
    -------
    tuple of float
        (A/B, B/C, C/D) in mm/s r.m.s.

    Raises
    ------
    SignalError
        For an unknown group or support (``field`` names which).

    References
    ----------
    ISO 20816-3:2022 / ISO 10816-3:2009 Annex A (values from memory; see ``ZONE_LIMITS_MM_S``).
    """
    key = (int(machine_group), str(foundation).strip().lower())
    if key[1] not in ("rigid", "flexible"):
        raise SignalError(f"foundation {foundation!r} is unknown; use rigid or flexible", field="foundation")
    if key not in ZONE_LIMITS_MM_S:
        raise SignalError(
            f"machine group {machine_group!r} is unknown; use 1 (large machines, 300 kW-50 MW) "
            "or 2 (medium machines, 15-300 kW)",
            field="machine_group",
        )
    return ZONE_LIMITS_MM_S[key]


def zone(velocity_rms_mm_s: float, limits: tuple[float, float, float]) -> str:
    """ISO 20816 evaluation zone of an overall velocity.

    Parameters
    ----------
    velocity_rms_mm_s : float
        Broad-band velocity r.m.s. in mm/s.
    limits : tuple of float
        (A/B, B/C, C/D) boundaries in mm/s r.m.s., from :func:`zone_limits`.

    Returns
    -------
    str
        ``"A"`` below A/B, ``"B"`` up to B/C, ``"C"`` up to C/D, ``"D"`` above; a value on a boundary
        is the higher zone.
    """
    ab, bc, cd = limits
    if velocity_rms_mm_s < ab:
        return "A"
    if velocity_rms_mm_s < bc:
        return "B"
    if velocity_rms_mm_s < cd:
        return "C"
    return "D"


def iso_band(f1x_hz: float, fs_hz: float) -> tuple[float, float]:
    """Measurement band of the overall level.

    Parameters
    ----------
    f1x_hz : float
        Forcing (shaft) frequency in Hz.
    fs_hz : float
        Sample rate of the record in Hz.

    Returns
    -------
    tuple of float
        10-1000 Hz, or 2-1000 Hz below 600 r/min; the top cut to 0.45·fs when the record cannot reach
        1000 Hz.

    References
    ----------
    ISO 10816-3:2009 (from memory).
    """
    lo = 2.0 if f1x_hz * 60.0 < 600.0 else 10.0
    return lo, min(1000.0, 0.45 * fs_hz)


def band_covers_standard(band_hz, f1x_hz: float) -> bool:
    """Whether an overall level measured over ``band_hz`` covers the standard's band for this forcing
    frequency (:func:`iso_band` without a sample-rate limit), so that an ISO zone may be graded. A record
    sampled at 512 Hz reaches 10-230 Hz only: its level is trended, but no zone is graded from it."""
    if not band_hz or band_hz[0] is None or band_hz[1] is None or not f1x_hz:
        return False
    need_lo, need_hi = iso_band(float(f1x_hz), math.inf)
    return float(band_hz[1]) >= need_hi * 0.999 and float(band_hz[0]) <= need_lo * 1.001


def waveform_stats(x: np.ndarray) -> Waveform:
    """Waveform statistics of a detrended acceleration record.

    Parameters
    ----------
    x : ndarray
        Detrended acceleration samples.

    Returns
    -------
    Waveform
        Acceleration r.m.s. and peak (record units), crest factor (peak / r.m.s.) and Pearson kurtosis
        (3 for Gaussian noise, 1.5 for a sine); crest factor and kurtosis ``None`` for a zero record.
    """
    sq = x * x
    ms = float(np.mean(sq))
    rms = float(np.sqrt(ms))
    peak = float(np.max(np.abs(x)))
    if rms <= 0.0:
        return Waveform(rms=0.0, peak=peak, crest_factor=None, kurtosis=None)
    kurt = dot(sq, sq) / len(x) / (ms * ms)
    return Waveform(rms=rms, peak=peak, crest_factor=peak / rms, kurtosis=kurt)
