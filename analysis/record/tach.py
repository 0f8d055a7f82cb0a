"""Tachometer / once-per-revolution pulses: pulse times from a pulse channel, their checks, shaft phase.

A tach channel is a pulse train (a key-phasor notch, a reflective tape under an optical probe, a toothed
wheel under a proximity or magnetic probe). Three steps, each a pure function:

``pulses_from_channel``  threshold with hysteresis (a Schmitt trigger), rising edges, sub-sample time of
                         the crossing of the mid level by linear interpolation between the two samples;
``check_pulses``         refuse (``SignalError``) too few pulses, pulses that do not cover the record, or
                         revolution times that jump between neighbouring revolutions by more than
                         ``PERIOD_JUMP_TOLERANCE`` (a missed or doubled pulse, a second reflecting mark);
``phase_from_pulses``    shaft phase θ(t), 2π per revolution: θ = 2π·k/P at pulse k, a monotone cubic
                         (PCHIP) through the pulse times, straight lines at the last speed outside them
                         (Fyfe & Munck 1997, Mech. Syst. Signal Process. 11(2), 187-205: computed order
                         tracking resamples at equal increments of this angle).

Nothing here guesses a missing pulse: a bad tach is refused with the reason, never repaired silently.
"""

from __future__ import annotations

import numpy as np

from analysis.errors import SignalError

#: Largest relative change of one pulse interval against the same interval one revolution before
#: (for one pulse per revolution: neighbouring revolution times). A missed pulse doubles an interval
#: (+100 %), a doubled pulse halves it (-50 %); a real machine changes its speed by far less than 25 %
#: within one revolution, even on a fast run-up (common practice, value from memory).
PERIOD_JUMP_TOLERANCE = 0.25
#: Fewest whole revolutions a record's pulses must span (a phase needs a few revolutions to interpolate).
MIN_REVOLUTIONS = 4
#: Largest gap, in revolutions at the local speed, between the record's start (end) and the first
#: (last) pulse: a longer gap means pulses are missing there and the phase would be extrapolated.
END_GAP_REVOLUTIONS = 1.5
#: The channel's span: from its 0.1th to its 99.9th percentile, so a narrow pulse (a reflective tape, a
#: key notch: down to 0.1 % of the revolution) still sets the top, while a rare spike does not
SPAN_PERCENTILES = (0.1, 99.9)
#: Hysteresis half-width as a share of the channel's span (``SPAN_PERCENTILES``): noise smaller than
#: this never makes a second edge (common practice for Schmitt triggers on pulse inputs; value ours).
HYSTERESIS_SHARE = 0.1
#: Most pulses per revolution accepted (a 360-tooth wheel gives one pulse per degree).
MAX_PULSES_PER_REV = 360


def pulses_from_channel(ch, fs: float, *, level: float | None = None) -> np.ndarray:
    """Pulse times (s from the first sample) of a pulse-train channel.

    Parameters
    ----------
    ch : array_like
        The tach channel's samples (any unit: volts, counts).
    fs : float
        Sample rate in Hz.
    level : float, optional
        Trigger level in the channel's unit; default: halfway across its span (``SPAN_PERCENTILES``). The
        hysteresis band is ± ``HYSTERESIS_SHARE`` of that span around the level.

    Returns
    -------
    numpy.ndarray
        Increasing pulse times in s: where the channel rises through ``level``, interpolated between
        samples. The pulses are not checked here; call ``check_pulses``.

    Raises
    ------
    SignalError
        (``field="tach_channel"``) for non-finite samples, a flat channel, or a level outside the span.
    """
    x = np.asarray(ch, dtype=np.float64).ravel()
    fs = float(fs)
    if not np.isfinite(fs) or fs <= 0:
        raise SignalError(f"sample rate {fs!r} must be a positive number in Hz", field="sample_rate_hz")
    if x.size < 2:
        raise SignalError("the tach channel has fewer than 2 samples", field="tach_channel")
    if not np.all(np.isfinite(x)):
        raise SignalError(
            f"the tach channel has {int(np.sum(~np.isfinite(x)))} non-finite samples (NaN or inf); check "
            "the channel number and the recorder", field="tach_channel")
    lo_p, hi_p = np.percentile(x, SPAN_PERCENTILES)
    span = float(hi_p - lo_p)
    if not span > 1e-12 * max(1.0, float(np.max(np.abs(x)))):
        raise SignalError(
            "the tach channel is flat (no pulses); check the channel number, the probe gap and its supply",
            field="tach_channel")
    if level is None:
        level = 0.5 * float(lo_p + hi_p)
    else:
        level = float(level)
        if not (np.isfinite(level) and lo_p < level < hi_p):
            raise SignalError(
                f"tach level {level!r} lies outside the channel's span ({lo_p:.4g} to {hi_p:.4g}); give a "
                "level between the pulse base and its top, or leave it out", field="tach_level")
    band = HYSTERESIS_SHARE * span
    upper, lower = level + band, level - band
    # Schmitt trigger: +1 at or above the upper threshold, -1 at or below the lower one, else the last state
    mark = np.where(x >= upper, 1, np.where(x <= lower, -1, 0))
    idx = np.flatnonzero(mark)
    if idx.size == 0:
        return np.empty(0)
    states = mark[idx]
    # a rising edge: the first sample at +1 after a -1 (samples before the first -1 make no edge)
    rise = idx[1:][(states[1:] == 1) & (states[:-1] == -1)]
    if rise.size == 0:
        return np.empty(0)
    # the last upward crossing of the mid level before each edge: between samples k and k+1
    up = np.flatnonzero((x[:-1] < level) & (x[1:] >= level))
    k = up[np.searchsorted(up, rise, side="right") - 1]
    frac = (level - x[k]) / (x[k + 1] - x[k])
    return (k + frac) / fs


def _ppr(pulses_per_rev) -> int:
    try:
        p = int(pulses_per_rev)
        ok = float(pulses_per_rev) == p
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok or not 1 <= p <= MAX_PULSES_PER_REV:
        raise SignalError(
            f"pulses_per_rev {pulses_per_rev!r} must be a whole number from 1 to {MAX_PULSES_PER_REV} "
            "(1 for a once-per-revolution mark, the tooth count for a toothed wheel)",
            field="pulses_per_rev")
    return p


def check_pulses(times_s, pulses_per_rev: int = 1, record_duration_s: float | None = None, *,
                 field: str = "tach_pulses_s") -> np.ndarray:
    """The pulse times as a float array, or a ``SignalError`` saying what is wrong with the tach.

    Refused: non-finite or non-increasing times; times outside the record; fewer than
    ``MIN_REVOLUTIONS`` whole revolutions; a gap of more than ``END_GAP_REVOLUTIONS`` revolutions before
    the first or after the last pulse; a pulse interval that differs by more than
    ``PERIOD_JUMP_TOLERANCE`` from the same interval one revolution before.
    """
    ppr = _ppr(pulses_per_rev)
    try:
        t = np.asarray(times_s, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        raise SignalError(f"{field} must be a list of pulse times in s from the record's first sample",
                          field=field) from None
    if not np.all(np.isfinite(t)):
        raise SignalError(f"{field} holds non-finite times (NaN or inf); send pulse times in s", field=field)
    need = MIN_REVOLUTIONS * ppr + 1
    if t.size < need:
        raise SignalError(
            f"the tach gives {t.size} pulses; at least {need} are needed ({MIN_REVOLUTIONS} revolutions at "
            f"{ppr} pulse(s) per revolution): check the tach channel, its level and pulses_per_rev, or "
            "send the record without a tach", field=field)
    d = np.diff(t)
    if np.any(d <= 0):
        i = int(np.flatnonzero(d <= 0)[0])
        raise SignalError(
            f"{field} must increase: pulse {i + 1} at {t[i + 1]:.6g} s is not after pulse {i} at "
            f"{t[i]:.6g} s", field=field)
    if record_duration_s is not None:
        dur = float(record_duration_s)
        if t[0] < -1e-9 * max(dur, 1.0) or t[-1] > dur * (1 + 1e-9):
            raise SignalError(
                f"{field} run from {t[0]:.6g} s to {t[-1]:.6g} s but the record lasts {dur:.6g} s; give "
                "times in s from the record's first sample", field=field)
        first_rev, last_rev = t[ppr] - t[0], t[-1] - t[-1 - ppr]
        if t[0] > END_GAP_REVOLUTIONS * first_rev or dur - t[-1] > END_GAP_REVOLUTIONS * last_rev:
            raise SignalError(
                f"the tach pulses cover only {t[0]:.3f}-{t[-1]:.3f} s of the {dur:.3f} s record (one "
                f"revolution takes about {first_rev:.3g} s): pulses are missing at the "
                f"{'start' if t[0] > END_GAP_REVOLUTIONS * first_rev else 'end'}; check the tach channel",
                field=field)
    if d.size > ppr:
        ratio = d[ppr:] / d[:-ppr]
        jump = np.abs(ratio - 1.0)
        bad = np.flatnonzero(jump > PERIOD_JUMP_TOLERANCE)
        if bad.size:
            i = int(bad[0]) + ppr
            raise SignalError(
                f"the tach is irregular: the pulse interval at {t[i]:.4f} s is {d[i] * 1e3:.4g} ms against "
                f"{d[i - ppr] * 1e3:.4g} ms one revolution before ({100 * (ratio[bad[0]] - 1):+.0f} %, "
                f"tolerance ±{100 * PERIOD_JUMP_TOLERANCE:.0f} %; {bad.size} such jump(s)): a missed or "
                "extra pulse; check the probe gap, the trigger level and pulses_per_rev", field=field)
    return t


def phase_from_pulses(times_s, pulses_per_rev: int, t) -> np.ndarray:
    """Shaft phase in rad (2π per revolution, 0 at the first pulse) at the times ``t`` (s).

    θ(t_k) = 2π·k/P at pulse k; between pulses a monotone cubic (PCHIP: Fritsch & Carlson 1980, SIAM J.
    Numer. Anal. 17(2), as scipy.interpolate.PchipInterpolator), so the phase never runs backwards; before
    the first and after the last pulse a straight line at the speed of the nearest revolution.
    Call ``check_pulses`` first.
    """
    from scipy.interpolate import PchipInterpolator

    ppr = _ppr(pulses_per_rev)
    tp = np.asarray(times_s, dtype=np.float64).ravel()
    theta = 2.0 * np.pi * np.arange(tp.size) / ppr
    tq = np.asarray(t, dtype=np.float64)
    out = PchipInterpolator(tp, theta, extrapolate=False)(tq)
    if tp.size <= ppr:
        raise SignalError(f"{tp.size} pulses do not make one revolution at {ppr} per revolution",
                          field="tach_pulses_s")
    w0 = 2.0 * np.pi / (tp[ppr] - tp[0])  # rad/s over the first and the last revolution
    w1 = 2.0 * np.pi / (tp[-1] - tp[-1 - ppr])
    before, after = tq < tp[0], tq > tp[-1]
    out = np.where(before, theta[0] + w0 * (tq - tp[0]), out)
    out = np.where(after, theta[-1] + w1 * (tq - tp[-1]), out)
    return out


def speed_from_pulses(times_s, pulses_per_rev: int) -> tuple[np.ndarray, np.ndarray]:
    """(mid-times s, shaft speed Hz = rev/s) of each revolution: 1 / (t[k+P] - t[k]) at (t[k]+t[k+P])/2."""
    ppr = _ppr(pulses_per_rev)
    tp = np.asarray(times_s, dtype=np.float64).ravel()
    period = tp[ppr:] - tp[:-ppr]
    return 0.5 * (tp[ppr:] + tp[:-ppr]), 1.0 / period


def mean_speed_hz(times_s, pulses_per_rev: int) -> float:
    """Mean shaft speed in Hz (rev/s) over the pulses: whole pulse intervals / P over their span."""
    tp = np.asarray(times_s, dtype=np.float64).ravel()
    return float((tp.size - 1) / _ppr(pulses_per_rev) / (tp[-1] - tp[0]))


def tach_phase(times_s, pulses_per_rev: int, n_samples: int, fs: float, *,
               field: str = "tach_pulses_s") -> np.ndarray:
    """Checked pulses -> the shaft phase at each sample of an ``n_samples`` record at ``fs`` Hz."""
    t = check_pulses(times_s, pulses_per_rev, n_samples / float(fs), field=field)
    return phase_from_pulses(t, pulses_per_rev, np.arange(n_samples) / float(fs))
