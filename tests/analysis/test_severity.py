"""Velocity conversion, ISO zones, waveform statistics, data-quality flags."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants
from scipy import stats

from analysis import analyze_record
from analysis.record.conditioning import band_velocity_rms, velocity_mm_s, velocity_waveform
from analysis.record.quality import quality_flags
from analysis.record.severity import (
    ZONE_LIMITS_MM_S,
    band_covers_standard,
    iso_band,
    waveform_stats,
    zone,
    zone_limits,
)
from analysis.record.spectrum import welch_psd
from analysis.record.validate import TO_M_S2


def test_standard_gravity_is_cgpm_value():
    # 3rd CGPM (1901): g_n = 9.80665 m/s² exactly; scipy.constants.g carries the same value
    assert TO_M_S2["g"] == 9.80665 == scipy.constants.g


def test_velocity_of_a_sine_is_a_over_2_pi_f():
    # V = A/(2πf) for a sine (common practice), g = 9.80665 m/s² (standard gravity, CGPM 1901):
    # 1 g peak at 50 Hz -> 31.2155 mm/s peak
    assert velocity_mm_s(1.0, 50.0, "g") == pytest.approx(31.2155, rel=1e-5)
    assert velocity_mm_s(1000.0, 10.0, "mm/s2") == pytest.approx(1.0 / (2 * np.pi * 10) * 1e3, rel=1e-12)


def test_velocity_waveform_of_a_sine_within_1pct():
    # V = A/(2πf) within 1 % after band-limited frequency-domain integration (common practice)
    fs, f0 = 2560.0, 47.3
    t = np.arange(int(fs * 20)) / fs
    v = velocity_waveform(2.0 * np.sin(2 * np.pi * f0 * t), fs, "m/s2", (10.0, 1000.0))
    mid = v[len(v) // 4 : 3 * len(v) // 4]
    assert np.max(np.abs(mid)) == pytest.approx(2.0 / (2 * np.pi * f0) * 1e3, rel=0.01)


def test_band_velocity_rms_of_1g_at_50hz():
    # 1 g peak at 50 Hz = 22.0727 mm/s r.m.s. (V = A/(2πf)/√2 for a sine; g = 9.80665 m/s², CGPM 1901)
    fs = 2048.0
    t = np.arange(int(fs * 32)) / fs
    f, p, _, _ = welch_psd(np.sin(2 * np.pi * 50.0 * t), fs, 4096)
    assert band_velocity_rms(f, p, "g", (10.0, 1000.0)) == pytest.approx(22.0727, rel=0.01)


@pytest.mark.parametrize(
    ("group", "support", "limits"),
    [  # ISO 10816-3:2009 / ISO 20816-3:2022 Annex A, velocity RMS mm/s, from memory
        (1, "rigid", (2.3, 4.5, 7.1)),
        (1, "flexible", (3.5, 7.1, 11.0)),
        (2, "rigid", (1.4, 2.8, 4.5)),
        (2, "flexible", (2.3, 4.5, 7.1)),
    ],
)
def test_iso_zone_boundaries(group, support, limits):
    assert zone_limits(group, support) == limits
    ab, bc, cd = limits
    assert zone(ab * 0.99, limits) == "A"
    assert zone(ab, limits) == "B"  # a value on a boundary belongs to the worse zone (from memory)
    assert zone(bc * 0.99, limits) == "B"
    assert zone(bc, limits) == "C"
    assert zone(cd * 0.999, limits) == "C"
    assert zone(cd, limits) == "D"


def test_iso_zone_table_has_exactly_the_two_groups():
    assert set(ZONE_LIMITS_MM_S) == {(1, "rigid"), (1, "flexible"), (2, "rigid"), (2, "flexible")}


def test_iso_band_below_600_rpm():
    # ISO 10816-3 (from memory): 10-1000 Hz, 2-1000 Hz for machines below 600 r/min
    assert iso_band(25.0, 5120.0) == (10.0, 1000.0)
    assert iso_band(9.0, 5120.0) == (2.0, 1000.0)


def test_overall_zone_end_to_end():
    # a 25 Hz sine of 4.0 mm/s RMS velocity is zone C for group 2 rigid (2.8 <= v < 4.5, from memory)
    fs, f0 = 2560.0, 25.0
    a_peak = 4.0 * np.sqrt(2) * 1e-3 * 2 * np.pi * f0  # m/s² peak for 4.0 mm/s RMS
    t = np.arange(int(fs * 60)) / fs
    r = analyze_record(a_peak * np.sin(2 * np.pi * f0 * t), fs, units="m/s2", forcing_hz=f0)
    assert r.overall.velocity_rms_mm_s == pytest.approx(4.0, rel=0.01)
    assert r.overall.zone == "C"
    assert r.orders["1X"].velocity_mm_s == pytest.approx(4.0 * np.sqrt(2), rel=0.01)


def test_no_zone_is_graded_when_the_record_cannot_reach_the_standards_band():
    # ISO 20816-1 / 10816-3 (from memory): the zone is graded on the 10-1000 Hz broad-band level; at 512 Hz
    # sampling the level covers 10-230 Hz only (0.45 fs, common practice for the anti-alias roll-off)
    fs, f0 = 512.0, 25.0
    a_peak = 4.0 * np.sqrt(2) * 1e-3 * 2 * np.pi * f0  # m/s² peak for 4.0 mm/s RMS (zone C if graded)
    t = np.arange(int(fs * 60)) / fs
    r = analyze_record(a_peak * np.sin(2 * np.pi * f0 * t), fs, units="m/s2", forcing_hz=f0)
    assert r.overall.band_hz == (10.0, pytest.approx(230.4))
    assert r.overall.velocity_rms_mm_s == pytest.approx(4.0, rel=0.01)  # still measured, for trending
    assert r.overall.zone == ""  # not graded
    assert band_covers_standard((10.0, 1000.0), f0) and not band_covers_standard((10.0, 230.4), f0)
    assert band_covers_standard((2.0, 1000.0), 9.0) and not band_covers_standard((10.0, 1000.0), 9.0)


def test_waveform_stats_sine_and_noise(rng):
    # a sine: crest factor √2, kurtosis 1.5; Gaussian noise: kurtosis 3 (common practice);
    # reference for kurtosis: scipy.stats.kurtosis(fisher=False)
    t = np.arange(100_000) / 1000.0
    w = waveform_stats(np.sin(2 * np.pi * 10.0 * t))
    assert w.crest_factor == pytest.approx(np.sqrt(2), rel=1e-4)
    assert w.kurtosis == pytest.approx(1.5, rel=1e-3)
    x = rng.standard_normal(200_000)
    x -= x.mean()
    assert waveform_stats(x).kurtosis == pytest.approx(stats.kurtosis(x, fisher=False), rel=1e-9)


def _base(rng, n=65536):
    t = np.arange(n) / 2560.0
    return np.sin(2 * np.pi * 25.0 * t) + 0.05 * rng.standard_normal(n)


def test_clean_record_has_no_quality_flags(rng):
    assert quality_flags(_base(rng), True) == ()


def test_flat_line(rng):
    assert "flat-line" in quality_flags(np.full(10000, 0.02), True)
    x = _base(rng)
    x[: len(x) * 2 // 3] = 0.0
    assert "flat-line" in quality_flags(x, True)


def test_clipping(rng):
    assert "clipping" in quality_flags(np.clip(_base(rng), -0.8, 0.8), True)


def test_dc_jump(rng):
    x = _base(rng)
    x[40000:] += 1.0
    assert quality_flags(x, True) == ("dc-jump",)


def test_impulsive(rng):
    x = _base(rng)
    x[[5000, 21000, 50000]] += 40.0  # cable knocks
    assert "impulsive" in quality_flags(x, True)


def test_growing_tone_is_not_impulsive(make_record):
    x = make_record(2560.0, 30.0, [(25.0, 1.0, 0.0), (12.5, 5.0, 0.4)], noise=0.01)
    assert "impulsive" not in quality_flags(x, True)
