"""A line that emerges near the end of a long record, and the 1X wander over the record.

References: the F law of a Welch average for the CFAR threshold of the shorter look (scipy.stats via
analysis.spectrum.cfar_threshold, checked in test_detect.py) and the exact binomial test
(scipy.stats.binomtest) for the false-alarm rate; the per-segment 1X of a linear chirp is its instantaneous
frequency at the segment centre (closed form), so max - min = drift x (n - nperseg) / n.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from analysis import analyze_record
from analysis.record.spectrum import calibrated_spectrum, choose_nperseg


def _late_line(seed, amp=0.0007, fs=2048.0, f1=25.0, seconds=240.0, last_s=12.0):
    rng = np.random.default_rng(seed)
    t = np.arange(int(fs * seconds)) / fs
    a = np.where(t > seconds - last_s, amp, 0.0)
    x = (
        0.1 * np.sin(2 * np.pi * f1 * t)
        + a * np.sin(np.pi * f1 * t + 1.0)
        + 0.01 * rng.standard_normal(len(t))
    )
    return x, fs, f1


def test_a_line_in_the_last_seconds_is_caught_by_the_last_segments():
    # 0.7 mg at 0.5X during the last 12 s of 240 s: 1/20 of the record, 13 dB of dilution in the average
    late = 0
    for seed in range(5):
        x, fs, f1 = _late_line(seed)
        nps, _ = choose_nperseg(len(x), fs, f1)
        whole = calibrated_spectrum(x, fs, nps)
        k = int(round(f1 / 2 / whole.df_hz))
        assert whole.amplitude[k - 1 : k + 2].max() < 0.4 * 0.0007  # diluted in the full average
        sub = analyze_record(x, fs, units="g", forcing_hz=f1).subharmonic
        assert sub.detected and sub.klass == "half-order" and sub.pfa == pytest.approx(1e-3)
        assert sub.frequency_hz == pytest.approx(f1 / 2, abs=0.05)
        if sub.spectrum == "last-segments":
            late += 1
            assert sub.amplitude > 0.7 * 0.0007  # the last segments read what is there now
            assert sub.to_dict()["spectrum"] == "last-segments"
    assert late >= 4


def test_two_looks_keep_the_stated_false_alarm_probability():
    # noise + 1X only: the record-level rate of detections (both looks) must not exceed the stated pfa
    fs, f1, pfa, trials = 1024.0, 50.0, 0.1, 250
    t = np.arange(16384) / fs
    rng = np.random.default_rng(8)
    hits = 0
    for _ in range(trials):
        x = 0.5 * np.sin(2 * np.pi * f1 * t) + rng.standard_normal(len(t))
        hits += analyze_record(x, fs, units="m/s2", forcing_hz=f1, pfa=pfa).subharmonic.detected
    assert stats.binomtest(hits, trials, pfa, alternative="greater").pvalue > 0.01, hits


@pytest.mark.parametrize(("drift", "tracking"), [(0.002, "none"), (0.01, "phase"), (0.05, "phase")])
def test_speed_wander_is_measured_and_tracked_past_one_bin(drift, tracking):
    # a speed that moves by more than a bin spacing over the record is order-tracked
    # (analysis/record/orders.py);
    # a tracked record is not flagged speed-drift: its lines are read in orders
    fs, f1, seconds = 4096.0, 24.0, 40.0
    t = np.arange(int(fs * seconds)) / fs
    phase = 2 * np.pi * f1 * (t + 0.5 * drift * t * t / seconds)  # 1X from f1 to f1 (1 + drift)
    rng = np.random.default_rng(2)
    x = 0.2 * np.sin(phase) + 0.05 * np.sin(2 * phase) + 0.005 * rng.standard_normal(len(t))
    r = analyze_record(x, fs, units="g", forcing_hz=f1 * (1 + drift / 2))
    nps, _ = choose_nperseg(len(t), fs, f1 * (1 + drift / 2))
    expected = drift * f1 * (len(t) - nps) / len(t)  # the segment centres span (n - nperseg) samples
    assert r.forcing.spread_hz == pytest.approx(expected, rel=0.15)
    assert r.to_dict()["forcing"]["spread_hz"] == pytest.approx(r.forcing.spread_hz)
    assert r.forcing.tracking == tracking
    assert "speed-drift" not in r.quality.flags
    if tracking != "none":  # the speed range of the ramp (analytic: f1 to f1 (1 + drift))
        assert r.forcing.speed_min_hz == pytest.approx(f1, rel=2e-3)
        assert r.forcing.speed_max_hz == pytest.approx(f1 * (1 + drift), rel=2e-3)
