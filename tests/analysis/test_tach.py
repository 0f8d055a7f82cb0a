"""Tach pulses: times from a pulse channel, the refusals of a bad tach, the shaft phase.

Reference: the speed profile is a linear ramp f(t) = f0 + (f1 - f0) t / T, whose phase is the one
scipy.signal.chirp(method="linear") uses, φ(t) = 2π (f0 t + (f1 - f0) t² / (2T)) (scipy docs of chirp).
The true pulse times solve φ(t_k) = 2π k (the quadratic formula); scipy.signal.square(φ) rises from -1 to +1
exactly there (scipy docs of square: +1 for 0 <= φ mod 2π < 2π·duty).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from analysis.errors import SignalError
from analysis.record.tach import (
    PERIOD_JUMP_TOLERANCE,
    check_pulses,
    phase_from_pulses,
    pulses_from_channel,
    speed_from_pulses,
    tach_phase,
)

FS, T, F0, F1 = 5120.0, 8.0, 28.5, 31.5  # a 10 % run-up over 8 s (invented)


def true_pulse_times(f0=F0, f1=F1, dur=T, per_rev=1):
    """Roots of f0 t + (f1 - f0) t² / (2 dur) = k / per_rev, k = 0, 1, ... within the record."""
    a = 0.5 * (f1 - f0) / dur
    revs = f0 * dur + a * dur * dur
    k = np.arange(int(np.floor(revs * per_rev)) + 1) / per_rev
    t = (-f0 + np.sqrt(f0 * f0 + 4 * a * k)) / (2 * a)
    return t[t <= dur - 1.0 / FS]  # pulses at or before the last sample


def record_time(n=int(FS * T)):
    return np.arange(n) / FS


def ramp_phase(t):
    return 2 * np.pi * (F0 * t + 0.5 * (F1 - F0) / T * t * t)


def test_square_train_pulse_times_within_one_sample():
    # scipy.signal.square as the reference pulse train: an ideal step lands between two samples, so the
    # best a sampled edge can give is within one sample period (common practice)
    t = record_time()
    ch = 5.0 * (signal.square(ramp_phase(t)) + 1.0) / 2.0  # 0-5 V TTL-like pulses
    got = pulses_from_channel(ch, FS)
    want = true_pulse_times()[1:]  # the edge at t = 0 has no sample below the level before it
    assert got.size == want.size
    assert np.max(np.abs(got - want)) <= 1.0 / FS


def test_smooth_pulse_edges_are_timed_to_a_small_fraction_of_a_sample():
    # a finite rise time: tanh of scipy.signal.chirp's sine (phi=-90 makes it sin φ, rising through 0 at
    # φ = 2πk); linear interpolation of the crossing recovers the sub-sample time
    t = record_time()
    ch = np.tanh(4.0 * signal.chirp(t, F0, T, F1, method="linear", phi=-90))
    got = pulses_from_channel(ch, FS)
    want = true_pulse_times()[1:]
    assert got.size == want.size
    assert np.max(np.abs(got - want)) < 0.02 / FS


def test_speed_from_pulses_follows_the_ramp():
    # for a linear ramp, 1 / revolution time equals f at the revolution's mid-time exactly (mean of a
    # linear function); scipy.signal.chirp sets the profile
    t = record_time()
    ch = np.tanh(4.0 * signal.chirp(t, F0, T, F1, method="linear", phi=-90))
    mid, f = speed_from_pulses(pulses_from_channel(ch, FS), 1)
    want = F0 + (F1 - F0) * mid / T
    assert np.max(np.abs(f / want - 1.0)) < 1e-4


def test_hysteresis_ignores_noise_that_a_bare_threshold_counts():
    # noise of 3 % of the pulse height on slow edges: a bare level crossing counts extra edges, the
    # Schmitt trigger (hysteresis ±10 % of the span) counts each pulse once (common practice)
    rng = np.random.default_rng(4)
    t = record_time()
    ch = np.tanh(1.5 * np.sin(ramp_phase(t))) + 0.03 * rng.standard_normal(t.size)
    level = 0.5 * float(np.sum(np.percentile(ch, [0.1, 99.9])))
    bare = int(np.sum((ch[:-1] < level) & (ch[1:] >= level)))
    got = pulses_from_channel(ch, FS)
    want = true_pulse_times()[1:]
    assert bare > want.size  # the noise does make extra crossings
    assert got.size == want.size
    assert np.max(np.abs(got - want)) < 2.0 / FS


def test_narrow_pulses_set_the_span():
    # a reflective tape: the pulse lasts 0.5 % of a revolution (scipy.signal.square, duty 0.005), sampled at
    # 51.2 kHz (about 8 samples a pulse); the span must reach the top of so narrow a pulse
    fs = 51200.0
    t = np.arange(int(fs * 2.0)) / fs
    ch = signal.square(2 * np.pi * 30.0 * t, duty=0.005)
    got = pulses_from_channel(ch, fs)
    assert got.size == 59  # 60 revolutions in 2 s, the edge at t = 0 unseen
    assert np.max(np.abs(got - np.arange(1, 60) / 30.0)) <= 1.0 / fs


def test_given_level_and_inverted_levels():
    t = record_time()
    ch = 2.0 + 3.0 * (signal.square(ramp_phase(t)) + 1.0) / 2.0  # 2-5 V
    assert pulses_from_channel(ch, FS, level=3.0).size == true_pulse_times().size - 1
    with pytest.raises(SignalError) as e:
        pulses_from_channel(ch, FS, level=7.0)
    assert e.value.field == "tach_level" and "span" in str(e.value)


def test_phase_matches_the_chirp_phase():
    # θ(t) - θ(t_0) against the analytic phase of scipy.signal.chirp's linear sweep, inside and outside
    # the pulses (extrapolated at the end revolution's speed)
    t = record_time()
    ch = np.tanh(4.0 * signal.chirp(t, F0, T, F1, method="linear", phi=-90))
    p = pulses_from_channel(ch, FS)
    theta = tach_phase(p, 1, t.size, FS)
    want = ramp_phase(t) - ramp_phase(p[0])
    inside = (t >= p[0]) & (t <= p[-1])
    assert np.max(np.abs(theta - want)[inside]) < 1e-4  # rad
    # outside, a straight line at the nearest revolution's mean speed misses the ramp's quadratic term:
    # 2π·(df/dt)·Δt² with Δt one revolution = 2π·0.375·0.035² ≈ 2.9e-3 rad (worked by hand)
    assert np.max(np.abs(theta - want)[~inside]) < 4e-3
    assert np.all(np.diff(theta) > 0)


def test_phase_with_several_pulses_per_revolution():
    # four marks per revolution, evenly spaced: θ advances π/2 per pulse
    times = true_pulse_times(per_rev=4)
    t = np.linspace(0.0, T, 2001)
    theta = phase_from_pulses(times, 4, t)
    assert np.max(np.abs(theta - ramp_phase(t))) < 2e-3
    mid, f = speed_from_pulses(times, 4)
    assert np.max(np.abs(f / (F0 + (F1 - F0) * mid / T) - 1.0)) < 1e-4


def test_uneven_marks_repeat_each_revolution_and_pass():
    # two marks per revolution at 0° and 150° (not evenly spaced): each gap equals the same gap one
    # revolution before, so the check passes; comparing neighbouring gaps (150° vs 210°) would not
    revs = np.arange(40)
    times = np.sort(np.concatenate([revs, revs + 150 / 360]) / 30.0)
    check_pulses(times, 2, 40 / 30.0)


def test_missed_pulse_is_refused_with_the_tolerance():
    p = true_pulse_times()
    bad = np.delete(p, 100)
    with pytest.raises(SignalError) as e:
        check_pulses(bad, 1, T)
    msg = str(e.value)
    assert e.value.field == "tach_pulses_s"
    assert "irregular" in msg and f"±{100 * PERIOD_JUMP_TOLERANCE:.0f} %" in msg and "+100 %" in msg


def test_extra_pulse_is_refused():
    p = true_pulse_times()
    bad = np.sort(np.append(p, 0.5 * (p[50] + p[51])))
    with pytest.raises(SignalError, match="irregular"):
        check_pulses(bad, 1, T)


def test_wrong_pulses_per_rev_is_refused_on_a_toothed_wheel():
    # a 4-tooth wheel with one tooth missing (a common reference gap): the gap is 2x the others
    times = true_pulse_times(per_rev=4)
    times = times[np.arange(times.size) % 4 != 3]
    with pytest.raises(SignalError, match="irregular"):
        check_pulses(times, 4, T)


def test_a_real_speed_change_within_tolerance_passes():
    # a 10 % run-up over 8 s changes neighbouring revolutions by about 0.05 %: well within the tolerance
    assert check_pulses(true_pulse_times(), 1, T).size == true_pulse_times().size


@pytest.mark.parametrize(
    "times, ppr, dur, field, words",
    [
        ([], 1, 1.0, "tach_pulses_s", "0 pulses"),
        ([0.1, 0.2, 0.3], 1, 0.4, "tach_pulses_s", "at least 5"),
        (np.arange(12) / 30.0, 4, 0.4, "tach_pulses_s", "at least 17"),
        (np.r_[np.arange(10), 9.0] / 30.0, 1, 0.4, "tach_pulses_s", "must increase"),
        (np.arange(10) / 30.0 + 0.5, 1, 0.6, "tach_pulses_s", "record lasts"),
        (np.arange(10) / 30.0, 1, 2.0, "tach_pulses_s", "missing at the end"),
        (np.arange(10) / 30.0 + 1.0, 1, 1.4, "tach_pulses_s", "missing at the start"),
        (np.arange(10) / 30.0, 0, 1.0, "pulses_per_rev", "whole number"),
        (np.arange(10) / 30.0, 1.5, 1.0, "pulses_per_rev", "whole number"),
        ([0.0, float("nan"), 0.2], 1, 1.0, "tach_pulses_s", "non-finite"),
    ],
)
def test_bad_tach_is_refused_naming_the_field(times, ppr, dur, field, words):
    with pytest.raises(SignalError) as e:
        check_pulses(times, ppr, dur)
    assert e.value.field == field
    assert words in str(e.value)


def test_flat_or_broken_channel_is_refused():
    with pytest.raises(SignalError, match="flat"):
        pulses_from_channel(np.full(4096, 1.2), FS)
    ch = np.ones(4096)
    ch[7] = np.nan
    with pytest.raises(SignalError, match="non-finite"):
        pulses_from_channel(ch, FS)


# --- readers: a tach channel beside the acceleration (analysis/record/io.py) -------------------------------

def _two_channels():
    t = record_time(int(FS * 2))
    accel = 0.3 * np.sin(2 * np.pi * 30.0 * t)
    tach = 5.0 * (signal.square(2 * np.pi * 30.0 * t) + 1.0) / 2.0
    return t, accel, tach


def test_wav_tach_channel(tmp_path):
    # writer: scipy.io.wavfile (float32 WAV, samples x channels)
    from scipy.io import wavfile

    from analysis.record.io import read_any

    t, accel, tach = _two_channels()
    path = tmp_path / "two.wav"
    wavfile.write(path, int(FS), np.column_stack([tach, accel]).astype(np.float32))
    rec = read_any(path, str(path), tach_channel=1)
    np.testing.assert_allclose(rec.samples, accel, atol=1e-6)
    np.testing.assert_allclose(rec.tach, tach, atol=1e-6)
    assert pulses_from_channel(rec.tach, rec.fs_hz).size == 59  # 60 revolutions in 2 s, edge at 0 unseen
    with pytest.raises(SignalError) as e:
        read_any(path, str(path), tach_channel=3)
    assert e.value.field == "tach_channel" and "2 channel(s)" in str(e.value)


def test_csv_tach_channel_with_and_without_time_column(tmp_path):
    from analysis.record.io import read_any

    t, accel, tach = _two_channels()
    path = tmp_path / "three.csv"
    np.savetxt(path, np.column_stack([t, accel, tach]), delimiter=",", header="time_s,accel [g],tach [V]",
               comments="")
    rec = read_any(path, str(path), tach_channel=2)
    assert rec.fs_hz == pytest.approx(FS, rel=1e-6) and rec.units == "g"
    np.testing.assert_allclose(rec.tach, tach, atol=1e-9)
    np.testing.assert_allclose(rec.samples, accel, atol=1e-9)
    path2 = tmp_path / "two.csv"
    np.savetxt(path2, np.column_stack([tach, accel]), delimiter=",")
    rec2 = read_any(path2, str(path2), tach_channel=1, sample_rate_hz=FS)
    np.testing.assert_allclose(rec2.samples, accel, atol=1e-9)
    with pytest.raises(SignalError, match="tach channel 1 is not in this file"):
        path1 = tmp_path / "one.csv"
        np.savetxt(path1, accel[:, None], delimiter=",")
        read_any(path1, str(path1), tach_channel=1, sample_rate_hz=FS)


def test_uff_tach_channel(tmp_path):
    # writer: pyuff (open Universal File Format, two datasets 58 = two channels)
    import pyuff

    from analysis.record.io import read_any

    t, accel, tach = _two_channels()
    sets = [pyuff.prepare_58(
        binary=0, id1=name, func_type=1, rsp_node=1, rsp_dir=3, ref_node=1, ref_dir=3,
        abscissa_spacing=1, abscissa_spec_data_type=17, abscissa_axis_units_lab="s",
        ordinate_spec_data_type=12, ordinate_axis_units_lab=unit, orddenom_spec_data_type=0,
        z_axis_spec_data_type=0, data=data, x=t,
    ) for name, unit, data in (("accel", "g", accel), ("tach", "V", tach))]  # fmt: skip
    path = tmp_path / "two.uff"
    pyuff.UFF(str(path)).write_sets(sets, mode="add")
    rec = read_any(path.read_bytes(), "two.uff", tach_channel=2)
    assert rec.units == "g"
    np.testing.assert_allclose(rec.samples, accel, atol=1e-9)
    np.testing.assert_allclose(rec.tach, tach, atol=1e-9)


# --- analyze_record with tach pulses -------------------------------------------------------------------

def _ramp_record(seconds=12.8, seed=1):
    # invented: 1X ramps 28.5 -> 31.5 Hz, a 0.05 g peak line locked at half the shaft angle, 1 g at 1X
    t = np.arange(int(FS * seconds)) / FS
    ph = 2 * np.pi * (F0 * t + 0.5 * (F1 - F0) / seconds * t * t)
    x = np.sin(ph) + 0.05 * np.sin(ph / 2 + 0.3) + 0.002 * np.random.default_rng(seed).standard_normal(t.size)
    tach = np.tanh(4.0 * signal.chirp(t, F0, seconds, F1, method="linear", phi=-90))
    return x, pulses_from_channel(tach, FS)


def test_analyze_record_tracks_orders_from_the_tach():
    # computed order tracking (Fyfe & Munck 1997, MSSP 11(2)): resampled at equal shaft angle, a line
    # locked at half the shaft angle reads 0.5 orders with its true peak amplitude (0.05 g by construction)
    from analysis import analyze_record

    x, pulses = _ramp_record()
    d = analyze_record(x, FS, units="g", tach_pulses_s=pulses).to_dict()
    assert d["forcing"]["tracking"] == "tach"
    assert d["forcing"]["frequency_hz"] == pytest.approx(30.0, rel=1e-3)  # mean of the linear ramp
    assert d["forcing"]["speed_min_hz"] == pytest.approx(F0, rel=5e-3)
    assert d["forcing"]["speed_max_hz"] == pytest.approx(F1, rel=5e-3)
    s = d["subharmonic"]
    assert s["detected"] and s["class"] == "half-order"
    assert s["order"] == pytest.approx(0.5, abs=1e-3)
    assert s["accel_peak"] == pytest.approx(0.05, rel=0.03)


def test_analyze_record_refuses_a_bad_tach_rather_than_falling_back():
    from analysis import analyze_record

    x, pulses = _ramp_record()
    with pytest.raises(SignalError) as e:
        analyze_record(x, FS, units="g", tach_pulses_s=np.delete(pulses, 200))
    assert e.value.field == "tach_pulses_s" and "irregular" in str(e.value)
    with pytest.raises(SignalError) as e:
        analyze_record(x, FS, units="g", tach_pulses_s=pulses, forcing_hz=41.0)
    assert e.value.field == "forcing_hz" and "mean speed" in str(e.value)
    # a forcing at twice the shaft speed is a whole multiple: accepted, the phase scaled with it
    d = analyze_record(x, FS, units="g", tach_pulses_s=pulses, forcing_hz=60.0).to_dict()
    assert d["forcing"]["tracking"] == "tach"
    assert d["forcing"]["frequency_hz"] == pytest.approx(60.0, rel=1e-3)
    # a nominal speed only says the multiple: the tach measures the speed (mean of the ramp: 30 Hz)
    d = analyze_record(x, FS, units="g", tach_pulses_s=pulses, nominal_hz=29.0).to_dict()
    assert d["forcing"]["frequency_hz"] == pytest.approx(30.0, rel=1e-3) and d["forcing"]["source"] == "given"
    with pytest.raises(SignalError) as e:
        analyze_record(x, FS, units="g", tach_pulses_s=pulses, nominal_hz=40.0)
    assert e.value.field == "nominal_hz"
