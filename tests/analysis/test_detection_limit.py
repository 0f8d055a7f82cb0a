"""Detection at the physical limit: the whole-record look at 0.5X (1X given) and the per-record Pfa."""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from analysis import analyze_record
from analysis.record.known_look import whole_record_look
from analysis.record.spectrum import calibrated_spectrum, cfar_threshold, choose_nperseg

FS, F1, SIGMA = 160.0, 25.0, 0.1


def _record(rng, cycles, snr_db=None):
    """White noise (0.1 g r.m.s.) plus 1X; a 0.5X line at per-bin SNR (A²/2)/(N0·1.5/T) when snr_db is set."""
    n = int(round(cycles / F1 * FS))
    t = np.arange(n) / FS
    x = SIGMA * rng.standard_normal(n) + 0.2 * np.cos(2 * np.pi * F1 * t + rng.uniform(0, 2 * np.pi))
    if snr_db is not None:
        n0 = 2 * SIGMA**2 / FS
        amp = math.sqrt(2 * n0 * 1.5 / (n / FS) * 10 ** (snr_db / 10))
        x += amp * np.cos(np.pi * F1 * t + rng.uniform(0, 2 * np.pi))
    return x


def test_single_periodogram_threshold_is_the_exponential_law():
    # one periodogram bin of Gaussian noise over its known mean is exponential (χ²₂/2): Pfa = e^{-τ}, so
    # τ = -ln Pfa (Kay 1998, Fundamentals of Statistical Signal Processing vol. II, periodogram detector);
    # with an estimated floor the F(2, ν) law gives a higher threshold that tends to it as ν grows
    for pfa in (1e-2, 1e-3):
        assert abs(cfar_threshold(pfa, 1, 2.0, 1e9) - (-math.log(pfa))) < 1e-3
        assert cfar_threshold(pfa, 1, 2.0, 50.0) > -math.log(pfa)


def test_false_alarm_rate_on_noise_is_at_most_the_stated_pfa():
    # noise-only records, 1X given (all three looks run): alarms at a stated per-record Pfa of 5 %; the
    # exact binomial test (scipy.stats.binomtest) must not show a rate above the stated one (1 % level)
    pfa, trials = 0.05, 240
    rng = np.random.default_rng(77)
    alarms = 0
    for i in range(trials):
        x = _record(rng, (50, 150, 400)[i % 3])
        alarms += analyze_record(x, FS, units="g", forcing_hz=F1, pfa=pfa).subharmonic.detected
    assert stats.binomtest(alarms, trials, pfa, alternative="greater").pvalue > 0.01
    assert alarms / trials <= 2 * pfa


def test_whole_record_look_alone_keeps_its_share_of_pfa():
    # the look on its own at Pfa 0.1 on noise: its rate must not exceed 0.1 (exact binomial test)
    rng = np.random.default_rng(5)
    trials, hits = 300, 0
    for _ in range(trials):
        x = _record(rng, 400)
        x = x - x.mean()
        nps, _ = choose_nperseg(len(x), FS, F1)
        spec = calibrated_spectrum(x, FS, nps)
        hits += whole_record_look(x, FS, spec, F1, "g", 0.1).detected
    assert stats.binomtest(hits, trials, 0.1, alternative="greater").pvalue > 0.01


def test_near_the_limit_the_whole_record_look_finds_lines_and_tracks_the_ideal_curve():
    # at 11 dB per-bin SNR the ideal known-frequency detector has P_D = ncx2.sf(2·ln(1/Pfa), 2, 2·SNR)
    # (non-central χ², scipy.stats.ncx2; Kay 1998 vol. II; Marcum 1960) = 0.983 at Pfa 1e-2; ours must
    # reach at least 0.8 there at 150 and 400 cycles, and the whole-record look must take part
    pfa = 1e-2
    ideal = stats.ncx2.sf(-2 * math.log(pfa), 2, 2 * 10 ** 1.1)
    assert ideal > 0.98
    rng = np.random.default_rng(11)
    for cycles in (150, 400):
        subs = [
            analyze_record(_record(rng, cycles, 11.0), FS, units="g", forcing_hz=F1, pfa=pfa).subharmonic
            for _ in range(30)
        ]
        pd = np.mean([s.detected and s.klass == "half-order" for s in subs])
        assert pd >= 0.8
        assert any(s.spectrum == "whole-record" for s in subs)
        hits = [s for s in subs if s.spectrum == "whole-record"]
        # its frequency and amplitude are those of the line (Grandke interpolation on the unpadded bins)
        assert all(abs(s.frequency_hz - 0.5 * F1) < 1.5 / (cycles / F1) for s in hits)


def test_nominal_speed_keeps_two_looks():
    # with only a nominal speed the 0.5X location is itself estimated: no whole-record look
    rng = np.random.default_rng(3)
    for _ in range(10):
        x = _record(rng, 150, 11.0)
        sub = analyze_record(x, FS, units="g", nominal_hz=F1, pfa=1e-2).subharmonic
        assert sub.spectrum != "whole-record"
