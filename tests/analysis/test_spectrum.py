"""Calibrated spectrum, window figures, interpolation and Parseval against outside references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal, stats

from analysis.record.spectrum import (
    calibrated_spectrum,
    cfar_threshold,
    f_isf,
    grandke,
    hann,
    power,
    welch_nu_eff,
    welch_psd,
    window_figures,
)


def test_hann_matches_scipy_get_window():
    # reference: scipy.signal.get_window("hann", N) is the periodic Hann window (fftbins=True)
    for n in (64, 1000, 4096):
        np.testing.assert_allclose(hann(n), signal.get_window("hann", n), rtol=0, atol=1e-15)


def test_hann_coherent_gain_and_enbw_match_harris_1978():
    # Harris (1978), Proc. IEEE 66(1), 51-83, window table: Hann coherent gain 0.50, ENBW 1.50 bins;
    # rectangle 1.00 / 1.00 (Harris 1978, Proc. IEEE 66(1), Table 1; confirmed with scipy.signal.get_window)
    cg, enbw = window_figures(hann(4096))
    assert cg == pytest.approx(0.5, abs=1e-4)
    assert enbw == pytest.approx(1.5, abs=1e-4)
    cg_r, enbw_r = window_figures(signal.get_window("boxcar", 4096))
    assert (cg_r, enbw_r) == (pytest.approx(1.0), pytest.approx(1.0))


def test_hann_scallop_loss_matches_harris_1978():
    # Harris (1978): Hann scalloping loss 1.42 dB at half-bin offset (scipy.signal.get_window computation:
    # 1.4236 dB)
    n = 4096
    w = hann(n)
    k = np.arange(n)
    resp = abs(np.sum(w * np.exp(-2j * np.pi * 0.5 * k / n))) / np.sum(w)
    assert -20 * np.log10(resp) == pytest.approx(1.4236, abs=1e-3)


@pytest.mark.parametrize("offset", [0.0, 0.13, 0.25, 0.37, 0.5])
def test_sine_amplitude_within_1pct_and_frequency_within_005_bin(offset):
    # common practice / Grandke (1983) interpolation: a sine of peak A reads A within 1 %, frequency
    # within 0.05 bin, at and between bins
    fs, nps = 1024.0, 2048
    df = fs / nps
    f0 = (200 + offset) * df
    t = np.arange(16 * nps) / fs
    x = 2.5 * np.sin(2 * np.pi * f0 * t + 0.7)
    spec = calibrated_spectrum(x, fs, nps)
    pw = power(spec)
    k = int(np.argmax(pw))
    f, a = grandke(pw, k, spec.df_hz)
    assert a == pytest.approx(2.5, rel=0.01)
    assert abs(f - f0) / df < 0.05


def test_bin_centred_sine_reads_its_peak_amplitude_without_interpolation():
    # coherent-gain calibration (Harris 1978): a bin-centred sine of peak A reads A in the amplitude spectrum
    fs, nps = 1000.0, 1000
    t = np.arange(20 * nps) / fs
    spec = calibrated_spectrum(0.8 * np.sin(2 * np.pi * 123.0 * t), fs, nps)
    assert spec.amplitude[123] == pytest.approx(0.8, rel=1e-6)


def test_density_matches_scipy_welch_and_parseval(rng):
    # reference: scipy.signal.welch (Hann, 50 % overlap, constant detrend, density scaling); Parseval:
    # the density integrates to the variance of the record
    fs, nps = 2048.0, 1024
    x = rng.standard_normal(1024 * 40) + 0.3 * np.sin(2 * np.pi * 100.0 * np.arange(1024 * 40) / fs)
    f, p, k, _ = welch_psd(x, fs, nps)
    fr, pr = signal.welch(x, fs, window="hann", nperseg=nps, noverlap=nps // 2, detrend="constant")
    np.testing.assert_allclose(f, fr)
    np.testing.assert_allclose(p, pr, rtol=1e-10, atol=1e-18)
    assert np.sum(p) * (fs / nps) == pytest.approx(np.var(x), rel=0.02)


def test_nu_eff_hann_50pct_matches_welch_1967():
    # Welch (1967), IEEE Trans. Audio Electroacoust. AU-15: ν = 2K/(1 + 2Σ(1-j/K)ρ²(j)), Hann 50 %:
    # ρ(1) = 1/6, so 16 segments give 30.416 (Welch 1967: variance of overlapped averages; ρ(1) for Hann at 50
    # % overlap)
    assert welch_nu_eff(hann(1024), 512, 16) == pytest.approx(30.416, abs=1e-3)
    assert welch_nu_eff(hann(1024), 1024, 16) == pytest.approx(32.0)  # no overlap: 2K


def test_floor_estimates_white_noise_density(rng):
    # one-sided density of white noise of variance σ² sampled at fs is 2σ²/fs (Parseval, common practice)
    fs = 1000.0
    spec = calibrated_spectrum(0.5 * rng.standard_normal(200_000), fs, 2000)
    inner = spec.floor_psd[50:-50]
    assert np.median(inner) == pytest.approx(2 * 0.25 / fs, rel=0.05)


def test_chart_spectrum_keeps_peaks():
    fs, nps = 4096.0, 16384
    t = np.arange(4 * nps) / fs
    x = np.sin(2 * np.pi * 333.3 * t) + 1e-3 * np.sin(2 * np.pi * 1201.7 * t)
    spec = calibrated_spectrum(x, fs, nps)
    f, a = spec.chart(512)
    assert len(f) <= 512
    assert a.max() == spec.amplitude.max()  # the strongest line survives decimation
    assert abs(f[np.argmax(a)] - 333.3) < 2 * spec.df_hz


@pytest.mark.parametrize(
    ("p", "d1", "d2"), [(1e-3, 32, 435), (4.785e-4, 30.416, 400.0), (1e-6, 2, 27), (0.01, 1, 18)]
)
def test_f_quantile_matches_scipy_stats(p, d1, d2):
    # reference: scipy.stats.f.isf
    assert f_isf(p, d1, d2) == pytest.approx(stats.f.isf(p, d1, d2), rel=1e-9)


def test_cfar_threshold_matches_chi2_table():
    # scipy.stats.chi2 (the chi-square law of the averages): K = 16 independent averages, Pfa 1e-3 per bin ->
    # τ = 1.953 over a
    # known floor; with a floor of ~infinite degrees of freedom the F threshold tends to it
    assert cfar_threshold(1e-3, 1, 32.0, 1e9) == pytest.approx(1.953, abs=1e-3)
    assert cfar_threshold(1e-3, 1, 32.0, 1e9) == pytest.approx(stats.chi2.isf(1e-3, 32) / 32, rel=1e-6)
    # the family-wise correction: 21 bins at 1 % total -> 4.785e-4 per bin (Šidák correction 1 - 0.99^(1/21))
    tau = cfar_threshold(0.01, 21, 30.416, 1e9)
    assert tau == pytest.approx(2.0683, abs=1e-3)
