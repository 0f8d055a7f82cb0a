"""The decay rate of a noise-excited mode below its parametric threshold, from the slow flow.

Reference: the damped Mathieu equation x'' + 2ζω0 x' + ω0²(1 + h cos Ωt) x = ξ(t) with Ω = 2ω0 is
integrated here directly (semi-implicit Euler–Maruyama, Kloeden & Platen 1992, §9.1), independent of the
project's simulator. First-order averaging gives its two quadrature decay rates γ∓ = ζω0 (1 ∓ h/h_c)
with h_c = 4ζ (Nayfeh & Mook 1979, *Nonlinear Oscillations*, §5.7; Landau & Lifshitz, *Mechanics*, §27,
the damped threshold h > 4λ/ω0 with λ = ζω0). With a detuning the mode's frequency is read back as
f_W/2 − σ/2π.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from analysis.record.slow_flow import estimate, forcing_phase

FS_INT = 200.0  # integration rate, Hz (ω0·dt = 0.06)
DECIM = 5  # record at 40 Hz


def mathieu_record(seed: int, *, f0: float, zeta: float, ratio: float, f_w: float, dur: float,
                   one_x_peak_g: float = 0.05, floor_rms_g: float = 0.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    dt = 1.0 / FS_INT
    n = int(dur * FS_INT)
    w0 = 2 * math.pi * f0
    h = ratio * 4.0 * zeta
    om = 2 * math.pi * f_w
    kick = rng.standard_normal(n) * math.sqrt(dt)
    cosine = np.cos(om * np.arange(n) * dt).tolist()
    x = v = 0.0
    out = np.empty(n)
    c = 2 * zeta * w0
    w2 = w0 * w0
    for i, (k, cs) in enumerate(zip(kick.tolist(), cosine, strict=True)):
        v += (-c * v - w2 * (1.0 + h * cs) * x) * dt + k
        x += v * dt
        out[i] = x
    x = out[::DECIM]
    x *= 0.002 / x.std()  # a 0.002 g r.m.s. mode (units arbitrary for the estimate)
    t = np.arange(x.size) * DECIM / FS_INT
    x += one_x_peak_g * np.cos(om * t + 0.7)  # the forcing line the phase is taken from
    if floor_rms_g:
        x += floor_rms_g * rng.standard_normal(x.size)
    return x


def test_forcing_phase_of_a_clean_line_is_its_phase():
    """The analytic-signal phase of a sine (Hilbert transform; checked against the closed form)."""
    fs, f = 40.0, 4.0
    t = np.arange(4000) / fs
    ph = forcing_phase(np.cos(2 * math.pi * f * t + 0.3), fs, f)
    inner = slice(200, -200)
    assert np.allclose(ph[inner] - 2 * math.pi * f * t[inner], 0.3, atol=1e-3)


@pytest.mark.parametrize("ratio", [0.5, 0.8])
def test_narrow_decay_rate_below_threshold_matches_first_order_averaging(ratio):
    f0, zeta, dur = 2.0, 0.02, 600.0
    mu = zeta * 2 * math.pi * f0
    truth = mu * (1.0 - ratio)
    est = []
    for seed in range(3):
        x = mathieu_record(seed, f0=f0, zeta=zeta, ratio=ratio, f_w=2 * f0, dur=dur, floor_rms_g=0.0005)
        flow = estimate(x, FS_INT / DECIM, 2 * f0, 2.0 * truth)  # about what the spectral width gives
        assert flow is not None
        est.append(flow.narrow_rate_per_s)
        assert flow.damping_rate_per_s == pytest.approx(mu, rel=0.35)
    # median of three records within 30 % of γ− = ζω0 (1 − h/h_c)
    assert float(np.median(est)) == pytest.approx(truth, rel=0.30), (est, truth)


def test_the_detuning_gives_the_modes_own_frequency():
    f0, zeta, f_w = 2.03, 0.02, 4.0  # the mode lies 0.03 Hz above half the forcing
    x = mathieu_record(5, f0=f0, zeta=zeta, ratio=0.6, f_w=f_w, dur=600.0, floor_rms_g=0.0005)
    flow = estimate(x, FS_INT / DECIM, f_w, 0.2)
    assert flow is not None
    assert flow.detuning_rad_s < 0
    assert flow.mode_hz_for(f_w) == pytest.approx(f0, abs=0.01)


def test_a_record_too_short_for_the_rate_gets_no_estimate():
    x = mathieu_record(1, f0=2.0, zeta=0.02, ratio=0.5, f_w=4.0, dur=60.0)
    assert estimate(x, FS_INT / DECIM, 4.0, 0.1) is None  # 60 s is 6 spans of 1/γ, under 20
