"""analyze_record: one record in, a RecordAnalysis out."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from analysis.errors import SignalError
from analysis.record.conditioning import band_velocity_rms, detrend, velocity_mm_s
from analysis.record.detect import HALF_ORDER_TOL, detect_subharmonic, other_tones
from analysis.record.forcing import line_near, refine_forcing
from analysis.record.growth import band_signal, chart_envelope, estimate_growth, growth_band, not_estimated
from analysis.record.known_look import whole_record_look
from analysis.record.orders import (
    TRACK_BINS,
    angle_growth_to_time,
    resample_to_angle,
    shaft_phase_from_signal,
)
from analysis.record.precursor import bump_test
from analysis.record.quality import quality_flags
from analysis.record.segments import LAST_SEGMENTS, last_segments_spectrum, one_x_spread
from analysis.record.severity import (
    ZONE_STANDARD,
    band_covers_standard,
    iso_band,
    waveform_stats,
    zone,
    zone_limits,
)
from analysis.record.spectrum import MIN_CYCLES, calibrated_spectrum, choose_nperseg, min_samples, power
from analysis.record.tach import check_pulses, mean_speed_hz, phase_from_pulses
from analysis.record.validate import normalize_units, validate_samples
from analysis.results import Forcing, OrderLine, Overall, Quality, RecordAnalysis

#: 1X wander (max - min over the record, in orders) that invalidates the half-order reading: 0.5X moves by
#: half the 1X change, so a 2 % wander smears it over ±0.01 orders, the whole ±2 % half-order window
SPEED_DRIFT_ORDERS = 2 * HALF_ORDER_TOL
#: share of the record's false-alarm probability given to the whole-record look at 0.5X when 1X is given
#: (the averaged and last-segment looks take half the rest each); measured in bench/detection_limit.py
WHOLE_LOOK_SHARE = 0.8


def _check_speed(value, name: str, fs: float) -> float:
    try:
        f = float(value)
    except (TypeError, ValueError):
        raise SignalError(
            f"{name} {value!r} is not a number; give the 1X frequency in Hz (r/min / 60)", field=name
        ) from None
    if not np.isfinite(f) or f <= 0:
        raise SignalError(
            f"{name} must be a positive frequency in Hz (r/min / 60), got {value!r}", field=name
        )
    if 2.5 * f >= fs / 2:
        raise SignalError(
            f"{name} {f:g} Hz is too high for a {fs:g} Hz sample rate: 2.5X must lie below "
            f"Nyquist ({fs / 2:g} Hz); record at least {5.2 * f:.0f} Hz",
            field=name,
        )
    return f


#: largest relative gap between a forcing_hz given with tach pulses and the nearest whole or half multiple
#: of the pulses' mean speed (2 %: the half-order window; beyond it the two speeds disagree)
TACH_FORCING_TOL = 0.02
#: the same for a nominal_hz given with tach pulses: the ±5 % a nominal speed is refined within
TACH_NOMINAL_TOL = 0.05


def _forcing_per_rev(forcing_hz, shaft_hz: float, *, name: str = "forcing_hz",
                     tol: float = TACH_FORCING_TOL) -> float:
    """Forcing cycles per shaft revolution (a multiple of 0.5) from a speed and the tach speed."""
    try:
        ratio = float(forcing_hz) / shaft_hz
    except (TypeError, ValueError):
        ratio = float("nan")
    k = round(2.0 * ratio) / 2.0 if np.isfinite(ratio) else 0.0
    if k < 0.5 or abs(ratio / k - 1.0) > tol:
        raise SignalError(
            f"{name} {forcing_hz!r} disagrees with the tach pulses' mean speed {shaft_hz:.4g} Hz (not a "
            f"whole or half multiple within {100 * tol:g} %); check pulses_per_rev or leave {name} out",
            field=name)
    return k


def analyze_record(
    samples: np.ndarray,
    fs_hz: float,
    *,
    units: str = "g",
    forcing_hz: float | None = None,
    nominal_hz: float | None = None,
    machine_group: int = 2,
    foundation: str = "rigid",
    pfa: float = 1e-3,
    tach_pulses_s=None,
    pulses_per_rev: int = 1,
) -> RecordAnalysis:
    """Analyse one acceleration record for subharmonic onset.

    Parameters
    ----------
    samples : array_like
        Acceleration samples in ``units``.
    fs_hz : float
        Sample rate in Hz.
    units : str
        ``"g"``, ``"m/s2"`` or ``"mm/s2"`` (usual spellings accepted).
    forcing_hz, nominal_hz : float, optional
        Exactly one: the exact 1X (tachometer or drive), or a nominal speed refined from the spectrum
        within ±5 %.
    machine_group, foundation : int, str
        ISO 20816 machine group (1 or 2) and support (``"rigid"`` or ``"flexible"``) for the zone.
    pfa : float
        False-alarm probability of the subharmonic detector per record (0 < pfa < 0.5).
    tach_pulses_s, pulses_per_rev : array_like, int, optional
        Tachometer pulse times in s from the first sample and the pulses per shaft revolution; checked by
        ``analysis.tach.check_pulses`` (a bad tach raises, never a silent fallback). The shaft phase from
        them drives the order tracking (``forcing.tracking == "tach"``). Without forcing_hz / nominal_hz
        the mean speed of the pulses is the 1X; a forcing_hz given with them must be a whole or half
        multiple of that speed (within ``TACH_FORCING_TOL``; a nominal_hz within ``TACH_NOMINAL_TOL``):
        the forcing per revolution.

    Returns
    -------
    RecordAnalysis
        Frozen result; ``to_dict()`` names every amplitude's measure (``accel_peak``,
        ``velocity_peak_mm_s``, ``velocity_rms_mm_s``).

    Raises
    ------
    SignalError
        For bad input; its ``field`` names the argument and the message the fix.

    References
    ----------
    The methods and their sources are in docs/methods.md (Welch 1967; Marple 1999; ISO 20816-3).
    """
    x_raw, fs = validate_samples(samples, fs_hz)
    units = normalize_units(units)
    tach_phase_rad = None  # forcing phase at each sample from the tach pulses, for the order tracking
    if tach_pulses_s is not None:
        pulses = check_pulses(tach_pulses_s, pulses_per_rev, len(x_raw) / fs)
        shaft_hz = mean_speed_hz(pulses, pulses_per_rev)
        per_rev = 1.0
        if forcing_hz is not None:
            per_rev = _forcing_per_rev(forcing_hz, shaft_hz)
        elif nominal_hz is not None:  # the tach measures the speed: the nominal only says the multiple
            per_rev = _forcing_per_rev(nominal_hz, shaft_hz, name="nominal_hz", tol=TACH_NOMINAL_TOL)
            forcing_hz, nominal_hz = per_rev * shaft_hz, None
        else:
            forcing_hz = shaft_hz
        tach_phase_rad = per_rev * phase_from_pulses(pulses, pulses_per_rev, np.arange(len(x_raw)) / fs)
    if (forcing_hz is None) == (nominal_hz is None):
        raise SignalError(
            "give exactly one of forcing_hz (exact 1X, e.g. from a tachometer) or nominal_hz "
            "(nominal speed, refined from the spectrum)",
            field="forcing_hz",
        )
    if not (0.0 < float(pfa) < 0.5):
        raise SignalError(f"pfa {pfa!r} must lie between 0 and 0.5 (e.g. 0.001)", field="pfa")
    limits = zone_limits(machine_group, foundation)
    foundation = foundation.strip().lower()
    speed = _check_speed(
        forcing_hz if forcing_hz is not None else nominal_hz,
        "forcing_hz" if forcing_hz is not None else "nominal_hz",
        fs,
    )

    n = len(x_raw)
    nperseg, resolution_ok = choose_nperseg(n, fs, speed)
    if nperseg == 0:
        need_n = min_samples(fs, speed)  # the exact minimum of choose_nperseg: MIN_CYCLES cycles of 1X
        raise SignalError(
            f"the record is too short: {n} samples ({n / fs:.3f} s) at 1X = {speed:g} Hz; send at least "
            f"{need_n} samples ({need_n / fs:.3f} s at {fs:g} Hz, {MIN_CYCLES} cycles of 1X; "
            f"better {900.0 / speed:.0f} s to separate whirl from 0.5X)",
            field="samples",
        )
    x = detrend(x_raw)
    spec = calibrated_spectrum(x, fs, nperseg)

    if forcing_hz is not None:
        forcing = Forcing(frequency_hz=speed, source="given", nominal_hz=None)
    else:
        forcing = refine_forcing(spec, speed)
    f1 = forcing.frequency_hz

    # ---- order tracking (analysis/record/orders.py) -------------------------------------------------------
    # Rule: track when the per-segment 1X moves by more than TRACK_BINS bin spacings over the record (the
    # 0.5X line then smears over more than half a bin and loses its phase coherence). The shaft angle comes
    # from the tach pulses when given, else from the record (refused when its phase residual is too large);
    # the record is resampled to equal angle steps and everything below runs in orders on it, with x, fs,
    # spec and f1 rebound (fs = samples per rev x mean speed, so f1 is the mean speed). Overall level and
    # waveform statistics stay on the time record (x_time, spec_time).
    x_time, fs_time, spec_time = x, fs, spec
    spread, _ = one_x_spread(x, fs, spec, f1)
    angle = None
    tach_phase = tach_phase_rad
    if tach_phase is not None:
        angle = resample_to_angle(x, fs, tach_phase, source="tach")
    elif spread is not None and spread > TRACK_BINS * spec.df_hz:
        try:
            track = shaft_phase_from_signal(x, fs, f1)
        except SignalError:
            track = None
        if track is not None and track.trusted:
            angle = resample_to_angle(x, fs, track.phase_rad, source="phase")
    if angle is not None:
        x, fs, f1 = angle.samples, angle.fs_equiv_hz, angle.mean_speed_hz
        spec = calibrated_spectrum(x, fs, choose_nperseg(len(x), fs, f1)[0] or nperseg)
        forcing = replace(
            forcing,
            frequency_hz=f1,
            tracking=angle.source,
            speed_min_hz=angle.speed_min_hz,
            speed_max_hz=angle.speed_max_hz,
        )
    # ---- end of order tracking --------------------------------------------------------------------------

    # two looks, each at half the record's false-alarm probability: the full average, then the last
    # segments on their own (a line emerging near the end is diluted in the full average); with 1X given,
    # a third look at 0.5X on one periodogram of the whole record takes WHOLE_LOOK_SHARE of the probability
    # and the two others the rest in halves (Bonferroni: the shares add up to the record's pfa, whatever
    # the dependence between the looks)
    known_1x = forcing_hz is not None
    pfa_look = pfa * (1.0 - WHOLE_LOOK_SHARE) / 2 if known_1x else pfa / 2
    sub = detect_subharmonic(
        spec, f1, units, pfa_look, bump_test=lambda k, f: bump_test(x, fs, spec, k, f, f1)
    )
    late = None if sub.detected else last_segments_spectrum(x, fs, spec)
    if late is not None:
        n_late = (LAST_SEGMENTS + 1) * spec.nperseg // 2
        x_late = x[-n_late:]
        sub_late = detect_subharmonic(
            late, f1, units, pfa_look, bump_test=lambda k, f: bump_test(x_late, fs, late, k, f, f1)
        )
        # beside a noise-excited bump, few averages let it pass for a line (its skirts for a whirl line):
        # then only a half-order line that stands 6 dB over the bump's average reading counts
        bump_near = sub.precursor is not None and (
            sub_late.klass != "half-order" or (sub_late.amplitude or 0.0) < 2.0 * (sub.amplitude or 0.0)
        )
        if sub_late.detected and not bump_near:
            sub = replace(sub_late, spectrum="last-segments", precursor=sub_late.precursor or sub.precursor)
    if not sub.detected and known_1x and sub.precursor is None:
        whole = whole_record_look(x, fs, spec, f1, units, pfa * WHOLE_LOOK_SHARE)
        if whole.detected and whole.frequency_hz is not None:
            # a narrow noise-excited bump (a mode below threshold) is one or two bins wide at full
            # resolution too: the same line-vs-bump test as the averaged look (phase coherence, width)
            bump = bump_test(x, fs, spec, int(round(whole.frequency_hz / spec.df_hz)), whole.frequency_hz, f1)
            sub = whole if bump is None else replace(sub, precursor=bump)
    sub = replace(sub, pfa=pfa)
    pw = power(spec)
    orders = {}
    for name, mult in (("1X", 1.0), ("2X", 2.0)):
        hit = line_near(spec, pw, mult * f1)
        if hit is None:
            orders[name] = OrderLine(frequency_hz=None, amplitude=None, velocity_mm_s=None)
        else:
            orders[name] = OrderLine(
                frequency_hz=hit[1], amplitude=hit[2], velocity_mm_s=velocity_mm_s(hit[2], hit[1], units)
            )
    exclude = [orders["1X"].frequency_hz or f1, orders["2X"].frequency_hz or 2 * f1]
    if sub.detected:
        exclude.append(sub.frequency_hz)
        exclude += [
            mult * f1 for name, mult in (("1.5X", 1.5), ("2.5X", 2.5)) if sub.family.get(name) is not None
        ]
    tones = other_tones(spec, f1, pfa, exclude)

    line_hz = [t.frequency_hz for t in tones] + exclude[:2]
    if sub.detected:
        growth, env_t, env = estimate_growth(x, fs, sub.frequency_hz, f1, spec, line_hz)
    else:
        f_half = 0.5 * f1
        y, lo, hi, _ = band_signal(x, fs, f_half, growth_band(f_half, f1, spec.df_hz, line_hz))
        env_t, env = chart_envelope(y, fs, f_half)
        growth = not_estimated("no subharmonic detected", (lo, hi))
    if angle is not None:  # back from the equal-angle axis to the time of the record (order tracking)
        growth, env_t = angle_growth_to_time(growth, env_t, angle)

    band = iso_band(f1, fs_time)
    v_rms = band_velocity_rms(spec_time.freqs_hz, spec_time.psd, units, band)
    overall = Overall(
        velocity_rms_mm_s=v_rms,
        zone=zone(v_rms, limits) if band_covers_standard(band, f1) else "",  # "": not graded
        band_hz=band,
        machine_group=int(machine_group),
        foundation=foundation,
        zone_limits_mm_s=limits,
        standard=ZONE_STANDARD,
    )
    wave = waveform_stats(x_time)
    flags = quality_flags(x_raw, resolution_ok)
    forcing = replace(forcing, spread_hz=spread)
    if angle is None and spread is not None and spread > SPEED_DRIFT_ORDERS * f1:
        flags = (*flags, "speed-drift")  # the speed moved and could not be tracked
    notes: tuple[str, ...] = ()
    if spec_time.n_segments == 1:  # a short reading: say what its resolution cannot separate
        res = spec_time.df_hz
        notes = (
            f"short reading: one segment of {n / fs_time:.2f} s ({n / fs_time * f1:.0f} cycles of 1X), "
            f"resolution {res:.3g} Hz = {res / f1:.3f} orders: lines closer than that are not separated "
            f"(0.5X from whirl at {0.5 - res / f1:.2f}X, a line from its sidebands)",
        )
    quality = Quality(ok=not flags, flags=flags, notes=notes)
    for a in (env_t, env):
        a.setflags(write=False)
    return RecordAnalysis(
        sample_rate_hz=fs_time,
        n_samples=n,
        units=units,
        forcing=forcing,
        subharmonic=sub,
        growth=growth,
        overall=overall,
        orders=orders,
        waveform=wave,
        tones=tones,
        quality=quality,
        spectrum=spec,
        envelope_t_s=env_t,
        envelope=env,
    )
