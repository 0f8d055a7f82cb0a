"""Input checks shared by the readers, ``analyze_record`` and the server's raw/JSON ingest."""

from __future__ import annotations

import numpy as np

from analysis.errors import SignalError

#: Conversion of each accepted acceleration unit to m/s².  Standard gravity g_n = 9.80665 m/s² exactly
#: (3rd CGPM, 1901; equals scipy.constants.g).
TO_M_S2 = {"g": 9.80665, "m/s2": 1.0, "mm/s2": 1e-3}

_SPELLINGS = {
    "g": "g",
    "gn": "g",
    "g0": "g",
    "m/s2": "m/s2",
    "m/s^2": "m/s2",
    "m/s**2": "m/s2",
    "m/s²": "m/s2",
    "ms-2": "m/s2",
    "m s-2": "m/s2",
    "m/(s^2)": "m/s2",
    "m/sec2": "m/s2",
    "m/sec^2": "m/s2",
    "mps2": "m/s2",
    "mm/s2": "mm/s2",
    "mm/s^2": "mm/s2",
    "mm/s**2": "mm/s2",
    "mm/s²": "mm/s2",
    "mm s-2": "mm/s2",
    "mm/sec2": "mm/s2",
    "mm/sec^2": "mm/s2",
}

MIN_SAMPLES = 256
MIN_FS_HZ = 10.0
MAX_FS_HZ = 1.0e6
MAX_ABS_VALUE = 1.0e9  # 1e9 mm/s² is 1e5 g: larger values are a scaling error, not vibration


def normalize_units(units: str | None) -> str:
    """Canonical unit name of an acceleration unit.

    Parameters
    ----------
    units : str or None
        A usual spelling of g, m/s² or mm/s².

    Returns
    -------
    str
        ``"g"``, ``"m/s2"`` or ``"mm/s2"``.

    Raises
    ------
    SignalError
        For missing or unknown units (``field="units"``).
    """
    if units is None:
        raise SignalError("units are missing; give the acceleration units: g, m/s2 or mm/s2", field="units")
    key = str(units).strip().lower()
    for candidate in (key, key.replace(" ", "")):
        if candidate in _SPELLINGS:
            return _SPELLINGS[candidate]
    raise SignalError(f"unknown units {units!r}; use an acceleration unit: g, m/s2 or mm/s2", field="units")


def validate_sample_rate(fs_hz: float) -> float:
    """The sample rate as a float within the accepted range.

    Parameters
    ----------
    fs_hz : float
        Sample rate in Hz.

    Returns
    -------
    float
        The rate, between ``MIN_FS_HZ`` and ``MAX_FS_HZ``.

    Raises
    ------
    SignalError
        For a non-number or a rate out of range (``field="sample_rate_hz"``).
    """
    try:
        fs = float(fs_hz)
    except (TypeError, ValueError):
        raise SignalError(
            f"sample rate {fs_hz!r} is not a number; give it in Hz, e.g. 2560", field="sample_rate_hz"
        ) from None
    if not np.isfinite(fs) or not (MIN_FS_HZ <= fs <= MAX_FS_HZ):
        raise SignalError(
            f"sample rate {fs_hz!r} Hz is out of range; give a rate between {MIN_FS_HZ:g} Hz and "
            f"{MAX_FS_HZ:g} Hz",
            field="sample_rate_hz",
        )
    return fs


def validate_samples(samples, fs_hz: float) -> tuple[np.ndarray, float]:
    """Check a record and return it as a 1-D float64 array with its sample rate.

    Parameters
    ----------
    samples : array_like
        One channel of acceleration samples (a single row or column is accepted).
    fs_hz : float
        Sample rate in Hz.

    Returns
    -------
    tuple
        (samples as a 1-D float64 ndarray, sample rate in Hz).

    Raises
    ------
    SignalError
        For an empty or multi-column array, non-numeric or non-finite values, values beyond any
        accelerometer, a record shorter than MIN_SAMPLES or a sample rate outside [MIN_FS_HZ, MAX_FS_HZ].
    """
    fs = validate_sample_rate(fs_hz)
    try:
        x = np.asarray(samples, dtype=np.float64)
    except (TypeError, ValueError):
        raise SignalError("samples are not numbers; send one acceleration value per sample") from None
    if x.ndim == 2 and 1 in x.shape:
        x = x.reshape(-1)
    if x.ndim != 1:
        raise SignalError(f"samples have shape {x.shape}; send one channel as a 1-D sequence of values")
    if x.size == 0:
        raise SignalError("the record is empty; send at least a few seconds of samples")
    bad = int(np.count_nonzero(~np.isfinite(x)))
    if bad:
        first = int(np.flatnonzero(~np.isfinite(x))[0])
        raise SignalError(
            f"samples contain {bad} non-finite values (NaN or inf), the first at index {first}; "
            "remove or interpolate them before analysis"
        )
    peak = float(np.max(np.abs(x)))
    if peak > MAX_ABS_VALUE:
        raise SignalError(
            f"samples reach {peak:.3g}, beyond any accelerometer ({MAX_ABS_VALUE:g} in any unit); check the "
            "scaling and the units of the record"
        )
    if x.size < MIN_SAMPLES:
        raise SignalError(
            f"the record has only {x.size} samples; send at least {MIN_SAMPLES} "
            "(and enough seconds to resolve the half-order line, see the README)"
        )
    return x, fs
