"""Computed order tracking: the shaft phase from the record itself, and resampling to equal shaft angles.

Method (K. R. Fyfe & E. D. S. Munck, "Analysis of computed order tracking", Mechanical Systems and Signal
Processing 11(2), 1997, 187-205): estimate the shaft angle θ(t), then resample the record at equal
increments of θ, so that a component locked to the shaft is a sharp line at its order whatever the speed
does within the record.

θ(t) comes from the record (``shaft_phase_from_signal``: each harmonic k·X of the family is isolated by a
band-pass, its analytic-signal phase (Hilbert transform, computed as in scipy.signal.hilbert) is unwrapped
and divided by k; the harmonics are weighted by their power and the sum is smoothed by a least-squares
cubic spline) or from a tachometer (the caller builds the phase from the pulse times and passes it to
``resample_to_angle``; source "tach").

Resampling (``resample_to_angle``): a zero-phase low-pass below the new Nyquist order at the lowest speed
(anti-alias), then cubic-spline interpolation at the times of equal angle steps. Amplitudes keep their
calibration: a sine locked to the shaft with peak A is A cos(kθ + φ) at every angle sample.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import scipy.fft as sfft
from scipy.interpolate import BSpline, make_lsq_spline
from scipy.signal import fftconvolve, firwin

from analysis.errors import SignalError
from analysis.results import Growth

#: −6 dB point of the low-pass after demodulation, in orders of 1X: holds a 1X swing of about ±10 %
FIR_CUTOFF = 0.2
#: the record is decimated to about this many times the highest frequency used before demodulating
DECIMATE_TO = 2.5
#: length of that low-pass in revolutions (transition band about 3.3 / FIR_REVS orders, Hamming window)
FIR_REVS = 16.0
#: interior knots of the smoothing spline of the shaft phase, one every this many revolutions
KNOT_REVS = 12.0
#: a harmonic whose shaft angle strays from the strongest one by more than this (r.m.s., rad) is not used
HARMONIC_AGREE_RAD = 0.05
#: shaft-phase residual (r.m.s., rad of shaft angle) above which the record's own phase is not trusted
MAX_RESIDUAL_RAD = 0.2
#: order tracking starts when the per-segment 1X moves by more than this many bin spacings over the record
#: (analysis.pipeline): 0.5X then moves by more than half a bin and a fixed-frequency line test fails
TRACK_BINS = 1.0
#: anti-alias cut-off as a fraction of the new Nyquist order (spr / 2), applied at the lowest speed
ANTI_ALIAS_FRACTION = 0.9
_CHUNK = 16384  # angle samples interpolated at a time


@dataclass(frozen=True)
class PhaseTrack:
    """Shaft angle θ (rad, unwrapped, increasing) and speed (Hz, revolutions per second) at each sample."""

    phase_rad: np.ndarray
    speed_hz: np.ndarray
    source: str  # "phase" (from the record) | "tach" (from pulses)
    residual_rad: float = 0.0  # r.m.s. of the raw phase about the smooth one (shaft angle, rad)
    harmonics: tuple[int, ...] = (1,)  # the harmonics k·X the phase was built from

    @property
    def speed_min_hz(self) -> float:
        return float(np.min(self.speed_hz))

    @property
    def trusted(self) -> bool:
        """Whether the phase is clean enough to resample on (residual within ``MAX_RESIDUAL_RAD``)."""
        return bool(self.residual_rad <= MAX_RESIDUAL_RAD)

    @property
    def speed_max_hz(self) -> float:
        return float(np.max(self.speed_hz))


@dataclass(frozen=True)
class AngleRecord:
    """A record resampled at equal shaft-angle steps.

    ``samples`` holds ``samples_per_rev`` values per revolution; ``t_s`` the time of each (s from the first
    sample of the original record). ``fs_equiv_hz = samples_per_rev * mean_speed_hz`` is the sample rate of
    the same number of samples spread evenly over the record: on that axis a line at order o reads
    o * mean_speed_hz, so the fixed-rate spectrum code works in orders unchanged.
    """

    samples: np.ndarray
    samples_per_rev: int
    t_s: np.ndarray
    mean_speed_hz: float
    speed_min_hz: float
    speed_max_hz: float
    source: str

    @property
    def fs_equiv_hz(self) -> float:
        return self.samples_per_rev * self.mean_speed_hz

    def real_time(self, t_equiv_s: np.ndarray | float) -> np.ndarray:
        """Time in the original record (s) of a time on the equal-angle axis (sample j at j / fs_equiv)."""
        j = np.asarray(t_equiv_s, dtype=float) * self.fs_equiv_hz
        return np.interp(j, np.arange(len(self.t_s)), self.t_s)


def lowpass_taps(fs: float, f1_hz: float) -> np.ndarray:
    """Linear-phase FIR low-pass for the demodulated k·X (scipy.signal.firwin, Hamming window): −6 dB at
    ``FIR_CUTOFF`` × 1X, about ``FIR_REVS`` revolutions long, so it settles within half that at each end
    and rejects lines ≥ 0.5X away by more than 40 dB."""
    half = int(np.ceil(0.5 * FIR_REVS * fs / f1_hz))
    return firwin(2 * half + 1, FIR_CUTOFF * f1_hz, fs=fs, window="hamming")


def _demodulated(x: np.ndarray, k: int, theta0: np.ndarray, taps: np.ndarray) -> tuple[np.ndarray, float]:
    """Phase of the k·X component about a guide phase θ0, and its power.

    x·exp(−i k θ0) brings k·X near 0 Hz; the zero-lag FIR low-pass keeps it and rejects the other lines.
    The angle of the result is the analytic-signal phase of the band-passed k·X (the Hilbert phase) minus
    k θ0 (amplitude demodulation and the Hilbert transform give the same phase for a narrow band).
    """
    base = fftconvolve(x * np.exp(-1j * k * theta0), taps, mode="same")
    h = len(taps) // 2
    power = float(np.mean(np.abs(base[h : len(x) - h]) ** 2)) if len(x) > 2 * h else 0.0
    return theta0 + np.unwrap(np.angle(base)) / k, power


def shaft_phase_from_signal(
    x: np.ndarray, fs: float, f1_hz: float, *, family: tuple[int, ...] = (1, 2, 3)
) -> PhaseTrack:
    """Shaft angle from the record: band-pass around each k·X, analytic-signal phase, unwrap, divide by k.

    Parameters
    ----------
    x : ndarray
        The record (any units), detrended.
    fs : float
        Sample rate in Hz.
    f1_hz : float
        Mean 1X frequency in Hz (refined from the spectrum or given).
    family : tuple of int
        Harmonics tried; each one below 0.45 fs whose shaft angle agrees with that of the strongest harmonic
        within ``HARMONIC_AGREE_RAD`` is used, weighted by k² × its power (so a weak 1X with a strong 2X
        still gives a clean phase).

    Returns
    -------
    PhaseTrack
        Smooth shaft angle (least-squares cubic spline with a knot every ``KNOT_REVS`` revolutions,
        record ends down-weighted where the band-pass rings) and its derivative as the speed, source
        "phase".
    """
    x = np.asarray(x, dtype=float)
    n = len(x)
    if n < 64 or not f1_hz > 0:
        raise SignalError("a shaft phase needs a record of at least 64 samples and 1X > 0", field="samples")
    t = np.arange(n) / fs
    # the harmonics used lie below (max k + FIR_CUTOFF) x 1X: decimate to about DECIMATE_TO x that first
    # (anti-aliased), so the demodulation runs on a tenth of the samples of a typical record
    top = (max(family) + FIR_CUTOFF) * f1_hz
    step = max(1, int(fs / (DECIMATE_TO * top)))
    xd = x - x.mean()
    if step > 1:
        xd = _lowpass(xd, fs, 0.5 * fs / step)[::step]
    fs_d = fs / step
    nd = len(xd)
    td = t[::step]
    taps = lowpass_taps(fs_d, f1_hz)
    ring = min(len(taps) // 2, nd // 4)  # the filter is settled from half its length on
    inner = slice(ring, nd - ring)
    guide = 2 * np.pi * f1_hz * td
    raw, used = guide, [1]
    spline = None
    # pass 1: 1X about the nominal speed (the baseband turns at up to the speed swing); pass 2: every
    # harmonic about the smoothed estimate, whose baseband is nearly still
    for harmonics in ((1,), family):
        found = []
        for k in harmonics:
            if (k + FIR_CUTOFF) * f1_hz < 0.45 * fs_d:
                theta, power = _demodulated(xd, k, guide, taps)
                found.append((power * k * k, k, theta))  # phase noise of k·X is divided by k: weight k²
        if not found:
            raise SignalError(f"1X = {f1_hz:g} Hz is too close to Nyquist to track", field="samples")
        found.sort(key=lambda item: -item[0])
        ref = found[0][2]
        thetas, weights, used = [], [], []
        for w, k, theta in found:
            d = theta[inner] - ref[inner]
            if np.sqrt(np.mean((d - d.mean()) ** 2)) <= HARMONIC_AGREE_RAD:  # the family check
                thetas.append(theta)
                weights.append(w)
                used.append(k)
        raw = _combine(thetas, weights)
        spline = _smooth_phase(td, raw, ring)
        guide = spline(td)
    assert spline is not None
    resid = raw[inner] - guide[inner]
    phase = spline(t)
    speed = np.interp(t, td, spline.derivative()(td)) / (2 * np.pi)  # smooth: the decimated grid will do
    if np.any(speed <= 0) or not np.all(np.isfinite(phase)):
        raise SignalError(
            "the shaft phase from the record is not increasing; give a tachometer channel", field="samples"
        )
    return PhaseTrack(
        phase_rad=phase,
        speed_hz=speed,
        source="phase",
        residual_rad=float(np.sqrt(np.mean(resid * resid))),
        harmonics=tuple(sorted(used)),
    )


def _smooth_phase(t: np.ndarray, raw: np.ndarray, ring: int) -> BSpline:
    """Least-squares cubic spline through the raw shaft angle, a knot every ``KNOT_REVS`` revolutions.

    The first and last ``ring`` samples (where the low-pass settles) carry almost no weight and hold no
    knot, so each end piece is a cubic carried in from clean data.
    """
    n = len(t)
    wts = np.ones(n)
    if ring > 0:
        wts[:ring] = 1e-6
        wts[-ring:] = 1e-6
    revs = (raw[-1] - raw[0]) / (2 * np.pi)
    t_a, t_b = t[ring], t[n - 1 - ring]
    spacing = KNOT_REVS * (t[-1] - t[0]) / max(revs, 1e-12)
    n_knots = int(max(0, min(np.floor((t_b - t_a) / spacing) - 1, n // 64)))
    kdeg = 3
    inner = np.linspace(t_a, t_b, n_knots + 2)[1:-1] if n_knots > 0 else np.empty(0)
    knots = np.concatenate(([t[0]] * (kdeg + 1), inner, [t[-1]] * (kdeg + 1)))
    # the angle is smooth on the scale of a revolution: 4 points a revolution (48 a knot) are plenty
    step = max(1, int(n / max(4.0 * revs, 1.0)))
    sel = np.arange(0, n, step)
    if sel[-1] != n - 1:
        sel = np.append(sel, n - 1)
    return make_lsq_spline(t[sel], raw[sel], knots, k=kdeg, w=wts[sel])


def _combine(thetas: list[np.ndarray], weights: list[float]) -> np.ndarray:
    """Power-weighted mean of the per-harmonic shaft angles, each shifted onto the first (constants of k·X
    phase divided by k differ between harmonics)."""
    base = thetas[0]
    acc = np.zeros(len(base))
    for theta, w in zip(thetas, weights, strict=True):
        acc += w * (theta - np.mean(theta - base))
    return acc / float(np.sum(weights))


def _lowpass(x: np.ndarray, fs: float, cutoff_hz: float) -> np.ndarray:
    """Zero-phase low-pass by the FFT (cosine roll-off over the last 10 % below the cut-off)."""
    n = len(x)
    spec = sfft.rfft(x)
    df = fs / n
    k_edge, k_cut = int(np.ceil(0.9 * cutoff_hz / df)), int(np.floor(cutoff_hz / df)) + 1
    f = np.arange(k_edge, min(k_cut, len(spec))) * df
    spec[k_edge : k_edge + len(f)] *= 0.5 + 0.5 * np.cos(np.pi * (f - 0.9 * cutoff_hz) / (0.1 * cutoff_hz))
    spec[k_cut:] = 0.0
    return sfft.irfft(spec, n)


def cubic_at(y: np.ndarray, u: np.ndarray) -> np.ndarray:
    """y at fractional sample positions u by 4-point (cubic) Lagrange interpolation; the two end intervals
    use the nearest four samples. Exact for cubics; for a sine of f/fs = 0.1 the amplitude error is
    below 0.3 % (the anti-alias low-pass keeps the record well under that)."""
    n = len(y)
    i = np.clip(np.floor(u).astype(np.intp) - 1, 0, max(n - 4, 0))
    d = u - i  # position relative to y[i], in 0..3 inside the record
    y0, y1, y2, y3 = y[i], y[i + 1], y[i + 2], y[i + 3]
    return (
        -y0 * (d - 1) * (d - 2) * (d - 3) / 6
        + y1 * d * (d - 2) * (d - 3) / 2
        - y2 * d * (d - 1) * (d - 3) / 2
        + y3 * d * (d - 1) * (d - 2) / 6
    )


def resample_to_angle(
    x: np.ndarray,
    fs: float,
    phase_rad: np.ndarray,
    *,
    samples_per_rev: int | None = None,
    source: str = "phase",
) -> AngleRecord:
    """Resample a record to equal shaft-angle steps (computed order tracking, Fyfe & Munck 1997).

    Parameters
    ----------
    x : ndarray
        The record, at ``fs`` Hz.
    fs : float
        Sample rate in Hz.
    phase_rad : ndarray
        Shaft angle (rad, increasing) at each sample of x; 2π per revolution.
    samples_per_rev : int, optional
        Angle samples per revolution; by default the even number nearest fs / mean speed, so the record
        keeps about its number of samples.
    source : str
        "phase" or "tach": where the angle came from (reported with the result).

    Returns
    -------
    AngleRecord
        The samples at θ_j = θ_0 + 2π j / samples_per_rev, anti-aliased first: x is low-pass filtered
        below ``ANTI_ALIAS_FRACTION`` of the new Nyquist order at the lowest speed, so no order above it
        folds back.
    """
    x = np.asarray(x, dtype=float)
    phase = np.asarray(phase_rad, dtype=float)
    n = len(x)
    if phase.shape != x.shape:
        raise SignalError("the shaft phase needs one value per sample", field="phase_rad")
    if n < 8 or np.any(np.diff(phase) <= 0):
        raise SignalError("the shaft phase must increase from sample to sample", field="phase_rad")
    dphase = np.diff(phase)  # rad per sample
    speed_min = float(np.min(dphase)) * fs / (2 * np.pi)
    speed_max = float(np.max(dphase)) * fs / (2 * np.pi)
    duration = (n - 1) / fs
    revs = (phase[-1] - phase[0]) / (2 * np.pi)
    mean_speed = revs / duration
    if samples_per_rev is None:
        samples_per_rev = max(8, 2 * int(round(fs / mean_speed / 2)))
    spr = int(samples_per_rev)
    if spr < 4:
        raise SignalError("samples_per_rev must be at least 4", field="samples_per_rev")
    cutoff = min(ANTI_ALIAS_FRACTION * 0.5 * spr * speed_min, 0.5 * fs)
    y = _lowpass(x, fs, cutoff) if cutoff < 0.5 * fs else x
    m = int(np.floor((phase[-1] - phase[0]) / (2 * np.pi / spr) + 1e-9)) + 1
    idx = np.arange(n, dtype=float)
    samples, u_all = np.empty(m), np.empty(m)
    for j0 in range(0, m, _CHUNK):  # a block of angle samples at a time: bounded working memory
        theta_j = phase[0] + (2 * np.pi / spr) * np.arange(j0, min(j0 + _CHUNK, m))
        u = np.interp(theta_j, phase, idx)  # fractional sample position of each angle step
        # one Newton step on the cubic through the phase (linear interpolation of the position is off by
        # O(θ'') between samples)
        u -= (cubic_at(phase, u) - theta_j) / dphase[np.minimum(u.astype(np.intp), n - 2)]
        np.clip(u, 0.0, n - 1.0, out=u)
        samples[j0 : j0 + len(u)] = cubic_at(y, u)
        u_all[j0 : j0 + len(u)] = u
    return AngleRecord(
        samples=samples,
        samples_per_rev=spr,
        t_s=u_all / fs,
        mean_speed_hz=float(mean_speed),
        speed_min_hz=speed_min,
        speed_max_hz=speed_max,
        source=source,
    )


def angle_growth_to_time(growth: Growth, env_t: np.ndarray, angle: AngleRecord) -> tuple[Growth, np.ndarray]:
    """A growth fit made on the equal-angle axis, told in the record's own time.

    Times (onset, fit window, levelling, envelope samples) are mapped through the angle samples' times;
    the rate and its interval are scaled by the mean speed over the fit window against the record's mean
    speed (a rate per revolution times revolutions per second), so they are per second of the record.
    """
    t_real = angle.real_time(env_t) if len(env_t) else env_t

    def at(v: float | None) -> float | None:
        return None if v is None else float(angle.real_time(v))

    def pair(p: tuple[float | None, float | None]) -> tuple[float | None, float | None]:
        return at(p[0]), at(p[1])

    a, b = growth.fit_window_s
    scale = 1.0
    if a is not None and b is not None and b > a:
        ra, rb = at(a), at(b)
        if ra is not None and rb is not None and rb > ra:
            scale = (b - a) / (rb - ra)

    def rate(v: float | None) -> float | None:
        return None if v is None else v * scale

    g = replace(
        growth,
        rate_per_s=rate(growth.rate_per_s),
        ci95_per_s=(rate(growth.ci95_per_s[0]), rate(growth.ci95_per_s[1])),
        onset_s=at(growth.onset_s),
        fit_window_s=pair(growth.fit_window_s),
        onset_ci95_s=pair(growth.onset_ci95_s),
        level_off_s=at(growth.level_off_s),
    )
    return g, np.asarray(t_real, dtype=float)
