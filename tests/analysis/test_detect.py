"""Subharmonic detection: false-alarm rate, classes, unrelated tones, forcing refinement."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from analysis import analyze_record
from analysis.record.detect import significant_lines
from analysis.record.spectrum import calibrated_spectrum, choose_nperseg


@pytest.mark.parametrize(("n", "pfa"), [(8192, 0.1), (65536, 0.05)])
def test_false_alarm_rate_on_pure_noise_matches_stated_pfa(n, pfa):
    # chi-square law of the Welch average (scipy.stats.chi2 / F via cfar_threshold) sets the threshold;
    # the empirical rate over seeded noise-only records must agree with the stated Pfa within sampling
    # error: two-sided exact binomial test (scipy.stats.binomtest) at the 1 % level
    rng = np.random.default_rng(11)
    fs, f1 = 1024.0, 50.0
    nps, _ = choose_nperseg(n, fs, f1)
    trials = 600 if n == 8192 else 300
    hits = 0
    for _ in range(trials):
        spec = calibrated_spectrum(rng.standard_normal(n), fs, nps)
        hits += bool(significant_lines(spec, f1, pfa)[1])
    assert stats.binomtest(hits, trials, pfa).pvalue > 0.01, f"{hits}/{trials} false alarms at Pfa {pfa}"


def test_detects_half_order_with_family(make_record):
    # parametric subharmonic with its half-order family 1.5X, 2.5X (odd multiples of Ω/2: Landau & Lifshitz,
    # Mechanics §27)
    f1 = 29.5
    x = make_record(
        2560.0,
        60.0,
        [(f1, 0.5, 0), (2 * f1, 0.1, 0), (0.5 * f1, 0.02, 0), (1.5 * f1, 0.004, 0), (2.5 * f1, 0.002, 0)],
        noise=0.01,
    )
    r = analyze_record(x, 2560.0, units="g", forcing_hz=f1)
    s = r.subharmonic
    assert s.detected and s.klass == "half-order"
    assert s.order == pytest.approx(0.5, abs=1e-3)
    assert s.amplitude == pytest.approx(0.02, rel=0.02)
    # V = A/(2πf) with g = 9.80665 m/s² (CGPM 1901)
    assert s.velocity_mm_s == pytest.approx(0.02 * 9.80665 / (2 * np.pi * 0.5 * f1) * 1e3, rel=0.02)
    assert s.family["1.5X"] == pytest.approx(0.004, rel=0.05)
    assert s.family["2.5X"] == pytest.approx(0.002, rel=0.05)
    assert s.snr_db > s.threshold_db


def test_whirl_at_045x_is_sub_synchronous(make_record):
    # fluid-film whirl band about 0.38-0.48X (common practice; Muszynska 1986)
    f1 = 50.0
    x = make_record(2560.0, 30.0, [(f1, 0.5, 0), (0.45 * f1, 0.02, 0)], noise=0.01, seed=2)
    s = analyze_record(x, 2560.0, forcing_hz=f1).subharmonic
    assert s.detected and s.klass == "sub-synchronous"
    assert s.order == pytest.approx(0.45, abs=2e-3)


def test_whirl_at_047x_is_resolved_from_half_order(make_record):
    # 0.47X and 0.50X both present: resolution f1x/200 separates them (Rayleigh resolution 1/T, common
    # practice); the half-order
    # line wins the class, the whirl line stays among the tones
    f1 = 50.0
    x = make_record(
        2560.0, 40.0, [(f1, 0.5, 0), (0.5 * f1, 0.01, 0), (0.47 * f1, 0.02, 0)], noise=0.005, seed=3
    )
    r = analyze_record(x, 2560.0, forcing_hz=f1)
    assert r.subharmonic.klass == "half-order"
    assert r.subharmonic.order == pytest.approx(0.5, abs=1e-3)
    assert any(abs(t.order - 0.47) < 2e-3 for t in r.tones)


@pytest.mark.parametrize("order", [0.62, 0.31])
def test_unrelated_tone_is_not_a_subharmonic(make_record, order):
    # a line at 0.62X or 0.31X (e.g. a belt or a neighbouring machine) is reported as a tone, never detected
    f1 = 40.0
    x = make_record(2560.0, 40.0, [(f1, 0.5, 0), (order * f1, 0.05, 0)], noise=0.01, seed=4)
    r = analyze_record(x, 2560.0, forcing_hz=f1)
    assert not r.subharmonic.detected and r.subharmonic.klass == "none"
    assert r.tones and r.tones[0].order == pytest.approx(order, abs=2e-3)


def test_weak_line_below_threshold_is_not_detected(make_record):
    f1 = 40.0
    x = make_record(2560.0, 40.0, [(f1, 0.5, 0), (0.5 * f1, 1e-5, 0)], noise=0.05, seed=5)
    s = analyze_record(x, 2560.0, forcing_hz=f1).subharmonic
    assert not s.detected and s.klass == "none"
    assert s.snr_db is None or s.snr_db < s.threshold_db


def test_absolute_floor_rejects_a_tiny_line(make_record):
    # 1e-6 g at 20 Hz is 7.8e-5 mm/s: far above a noise-free floor, but below the absolute amplitude floor
    f1 = 40.0
    x = make_record(2560.0, 40.0, [(f1, 0.5, 0), (0.5 * f1, 1e-6, 0)], noise=1e-9, seed=6)
    assert not analyze_record(x, 2560.0, forcing_hz=f1).subharmonic.detected


def test_forcing_refined_from_nominal(make_record):
    # nominal 4 % off the true speed; a strong half-order line and a strong 2X must not capture the 1X
    f1 = 31.2
    x = make_record(
        2560.0,
        40.0,
        [(f1, 0.2, 0), (2 * f1, 0.6, 0), (0.5 * f1, 0.4, 0), (3 * f1, 0.05, 0)],
        noise=0.01,
        seed=7,
    )
    r = analyze_record(x, 2560.0, nominal_hz=30.0)
    assert r.forcing.source == "refined"
    assert r.forcing.frequency_hz == pytest.approx(f1, abs=0.005)
    assert r.subharmonic.klass == "half-order"


def test_forcing_refinement_prefers_the_line_with_a_harmonic_family(make_record):
    # a stray line of a neighbouring machine inside the ±5 % window, stronger than 1X but with no harmonics
    f1 = 25.0
    x = make_record(
        2560.0, 40.0, [(f1, 0.2, 0), (2 * f1, 0.1, 0), (3 * f1, 0.05, 0), (25.9, 0.3, 0)], noise=0.005, seed=8
    )
    r = analyze_record(x, 2560.0, nominal_hz=25.5)
    assert r.forcing.frequency_hz == pytest.approx(f1, abs=0.005)


def test_forcing_not_found_keeps_nominal(rng):
    x = rng.standard_normal(65536)
    r = analyze_record(x, 2560.0, nominal_hz=30.0)
    assert r.forcing.source == "nominal" and r.forcing.frequency_hz == 30.0


def test_tones_strongest_first_at_most_12_and_no_sidelobes(make_record):
    # a very strong 1X (about 100 dB over the floor) must not leave its Hann sidelobes among the tones
    # (Harris 1978: sidelobes fall 18 dB/octave); 16 real lines give the 12 strongest, in order
    x = make_record(2560.0, 40.0, [(29.6, 2.0, 0)], noise=1e-5, seed=1)
    assert analyze_record(x, 2560.0, forcing_hz=29.6).tones == ()
    lines = [(29.6, 2.0, 0)] + [(f, 0.01 * (i + 1), 0) for i, f in enumerate(np.linspace(40, 900, 16))]
    tones = analyze_record(
        make_record(2560.0, 40.0, lines, noise=1e-3, seed=1), 2560.0, forcing_hz=29.6
    ).tones
    assert len(tones) == 12
    amps = [t.amplitude for t in tones]
    assert amps == sorted(amps, reverse=True)
    assert amps[0] == pytest.approx(0.16, rel=0.01) and amps[-1] == pytest.approx(0.05, rel=0.02)
