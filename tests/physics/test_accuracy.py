"""The analysis core on simulated records: class, frequency, amplitude and growth rate within tolerances.

The truth of each record comes from the simulator: line frequencies and amplitudes as generated, and the
growth rate as the Floquet exponent of the damped Mathieu equation (scipy DOP853 monodromy, itself checked
against Landau & Lifshitz sections 27/29 in test_stability.py). The tolerances are ours, set from the seed
sweeps of bench/accuracy.py (which prints the full tables); here a smaller seed set keeps the suite quick.
"""

from __future__ import annotations

import numpy as np
import pytest

from analysis.record import pipeline
from analysis.sim.sim_scoring import growth_case, score
from analysis.sim.simulate import simulate


def _run(kind, seed, **params):
    rec = simulate(kind, seed=seed, fs_hz=8192.0, duration_s=16.0, forcing_hz=24.75, **params)
    res = pipeline.analyze_record(rec.samples, rec.fs_hz, units="g", forcing_hz=rec.truth["forcing_hz"])
    return score(rec.truth, res.to_dict())


def test_steady_half_order_line_is_found_and_measured():
    for seed in range(6):
        r = _run("half-order", 200 + seed)
        assert r["detected"] and r["class"] == "half-order"
        assert abs(r["freq_err_hz"]) < 0.01  # well inside one 1/16 s bin
        assert abs(r["amp_rel_err"]) < 0.05


def test_whirl_is_sub_synchronous_not_half_order():
    for seed in range(6):
        r = _run("whirl", 300 + seed)
        assert r["detected"] and r["class"] == "sub-synchronous"
        assert abs(r["freq_err_hz"]) < 0.02
        assert abs(r["amp_rel_err"]) < 0.1


@pytest.mark.parametrize("kind", ["healthy", "speed-drift"])
def test_no_false_alarm_without_a_subharmonic(kind):
    hits = [_run(kind, 400 + seed)["detected"] for seed in range(6)]
    assert not any(hits)


def test_weak_line_10_db_above_noise_in_1_hz_is_detected():
    amp = np.sqrt(2 * (0.02**2 / 4096.0) * 10.0)  # A^2/2 = 10 N0 (1 Hz), white noise 0.02 g at 8192 Hz
    for seed in range(6):
        assert _run("half-order", 500 + seed, sub_amp_g=amp)["detected"]


def test_growth_rate_of_growing_records_matches_floquet():
    case = growth_case(2.0, duration_s=16.0, forcing_hz=24.75)
    errs = [_run("parametric", 600 + seed, **case)["growth_rel_err"] for seed in range(6)]
    assert all(e is not None for e in errs)
    assert np.median(np.abs(errs)) < 0.05 and max(np.abs(errs)) < 0.1


def test_two_mode_onset_is_half_order_and_grows_at_floquet_rate():
    for seed in range(3):
        r = _run("two-mode", 700 + seed, ratio=2.0, onset_s=1.6, start_rel=1e-3)
        assert r["class"] == "half-order" and r["growth_state"] == "growing"
        assert abs(r["growth_rel_err"]) < 0.15
