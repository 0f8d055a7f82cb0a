"""Line or noise-excited bump at 0.5X: the bump is reported as a precursor, never as a half-order line.

References: a complex Ornstein-Uhlenbeck process e^{-γt} shifted to f_c has the Lorentzian spectrum
1/(γ² + (2πν)²), half-power full width γ/π (closed form; the half-power relation as in Ewins, *Modal
Testing* (2000), from memory); below threshold the parametric mode is two Lorentzians on f_W/2 whose narrow
decay rate is γ− = ζω0(1 − h/h_c) (noisy precursor, Wiesenfeld 1985, J. Stat. Phys. 38, 1071-1097) —
the simulator's truth carries it. Hann 3-dB width 1.44 bins: Harris (1978), Proc. IEEE 66(1).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from analysis.record import precursor
from analysis.record.pipeline import analyze_record
from analysis.sim.sim_scoring import growth_case
from analysis.sim.simulate import simulate


def _lorentzian_noise(rng, fs, seconds, f_c, gamma, rms):
    """Re(u(t) e^{2πi f_c t}) with u a complex OU process of decay rate gamma (exact AR(1) steps)."""
    n = int(seconds * fs)
    a = math.exp(-gamma / fs)
    w = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    u = signal.lfilter([math.sqrt(1 - a * a)], [1.0, -a], w)
    x = np.real(u * np.exp(2j * np.pi * f_c * np.arange(n) / fs))
    return x * rms / np.std(x)


def test_resolved_lorentzian_bump_is_a_precursor_with_the_closed_form_width():
    rng = np.random.default_rng(11)
    fs, f1, gamma = 256.0, 25.0, 0.8  # closed form: half-power width γ/π = 0.255 Hz
    x = _lorentzian_noise(rng, fs, 600.0, f1 / 2, gamma, 0.004)
    x += 0.02 * np.sin(2 * np.pi * f1 * np.arange(len(x)) / fs) + 2e-4 * rng.standard_normal(len(x))
    res = analyze_record(x, fs, units="g", forcing_hz=f1)
    sub = res.subharmonic
    assert not sub.detected and sub.klass == "none"
    p = sub.precursor
    assert p is not None and p.resolved
    assert p.width_hz == pytest.approx(gamma / math.pi, rel=0.25)
    assert p.narrow_rate_per_s == pytest.approx(gamma, rel=0.25)
    d = res.to_dict()["subharmonic"]["precursor"]
    assert d["width_hz"] == pytest.approx(p.width_hz) and d["evidence"] in ("width", "coherence")


@pytest.mark.parametrize("lam", [0.0, 0.3])
def test_a_line_steady_or_growing_is_not_a_bump(lam):
    rng = np.random.default_rng(5)
    fs, f1 = 2048.0, 25.0
    t = np.arange(int(16 * fs)) / fs
    a = 0.01 * np.exp(lam * (t - t[-1]))
    x = (
        a * np.sin(np.pi * f1 * t + 0.3)
        + 0.05 * np.sin(2 * np.pi * f1 * t)
        + 0.003 * rng.standard_normal(len(t))
    )
    sub = analyze_record(x, fs, units="g", forcing_hz=f1).subharmonic
    assert sub.klass == "half-order" and sub.precursor is None


def test_coherence_of_a_clean_line_is_one_and_of_narrowband_noise_lower():
    rng = np.random.default_rng(3)
    fs, f = 1024.0, 12.5
    t = np.arange(int(32 * fs)) / fs
    r, r_line = precursor.coherence(np.sin(2 * np.pi * f * t), fs, f, 1e-12, 0.25)
    assert r == pytest.approx(1.0, abs=1e-3) and r_line == pytest.approx(1.0, abs=1e-3)
    r, r_line = precursor.coherence(_lorentzian_noise(rng, fs, 32.0, f, 0.5, 1.0), fs, f, 1e-12, 0.25)
    assert r < 0.8 * r_line


def test_simulated_below_threshold_mode_is_rarely_called_half_order():
    # before the bump test every one of these records was "half-order" (bench/accuracy.py)
    called, reported = 0, 0
    for seed in range(10):
        rec = simulate(
            "parametric", seed=1000 + seed, fs_hz=8192.0, duration_s=16.0, forcing_hz=24.75, ratio=0.7
        )
        assert rec.truth["subharmonic"]["present"] is False
        sub = analyze_record(rec.samples, rec.fs_hz, units="g", forcing_hz=24.75).subharmonic
        called += sub.klass == "half-order"
        reported += sub.precursor is not None
    assert called <= 5 and reported == 10 - called


def test_simulated_growing_records_keep_their_half_order_class():
    case = growth_case(1.3, duration_s=16.0, forcing_hz=24.75)
    for seed in range(6):
        rec = simulate(
            "parametric", seed=2000 + seed, fs_hz=8192.0, duration_s=16.0, forcing_hz=24.75, **case
        )
        sub = analyze_record(rec.samples, rec.fs_hz, units="g", forcing_hz=24.75).subharmonic
        assert sub.klass == "half-order" and sub.precursor is None


def _long_precursor(seed, ratio):
    rec = simulate("parametric", seed=seed, fs_hz=320.0, duration_s=1200.0, forcing_hz=24.75, ratio=ratio)
    p = analyze_record(rec.samples, rec.fs_hz, units="g", forcing_hz=24.75).subharmonic.precursor
    assert p is not None
    return p.narrow_rate_per_s, rec.truth["precursor"]["narrow_rate_per_s"]  # truth: ζω0(1 - h/h_c)


def test_long_below_threshold_records_give_the_narrow_decay_rate_of_the_truth():
    at_half = [_long_precursor(seed, 0.5) for seed in (1, 2, 3)]
    at_08 = [_long_precursor(seed, 0.8) for seed in (1, 2, 3)]
    est_half, est_08 = np.median([e for e, _ in at_half]), np.median([e for e, _ in at_08])
    assert est_half == pytest.approx(at_half[0][1], rel=0.2)
    assert est_08 == pytest.approx(at_08[0][1], rel=0.25)
    assert est_08 < 0.6 * est_half  # the 0.5X resonance narrows towards threshold
