"""Operating-window fit on invented histories whose tongue follows the first-order damped Mathieu threshold.

Reference for the model the fit must recover: Landau & Lifshitz, *Mechanics*, sections 27 and 29 (first-order
tongue |W - 2 w0| < w0 sqrt(h^2/4 - 4 zeta^2), threshold h_c = 2 sqrt((eps/w0)^2 + 4 zeta^2)). The histories
are generated data with known f0, zeta, k (analysis.sim_history), not measurements.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from analysis.physics import stability as st
from analysis.physics.window import fit_operating_window
from analysis.sim.sim_history import simulate_history
from server.cli import main as cli_main

TRUTH = {"f0_hz": 12.4, "zeta": 0.012, "k": 0.25}


def _fit(h, speed=25.0, amp=0.25, growth=True):
    return fit_operating_window(
        h["speed_hz"],
        h["amp_1x"],
        h["present"],
        growth_rate_per_s=h["growth_rate_per_s"] if growth else None,
        today_speed_hz=speed,
        today_amp_1x=amp,
    )


def test_recovers_tongue_parameters_and_outputs_follow_landau_lifshitz():
    h = simulate_history(2000, seed=3, **TRUTH)
    fit = _fit(h)
    assert fit.status == "fit"
    assert fit.f0_hz == pytest.approx(12.4, rel=0.005)
    assert fit.zeta == pytest.approx(0.012, rel=0.1)
    assert fit.k_per_unit == pytest.approx(0.25, rel=0.05)
    for name, key in (("f0_hz", "f0_hz"), ("zeta", "zeta"), ("k_per_unit", "k")):
        assert abs(getattr(fit, name) - TRUTH[key]) < 4 * getattr(fit, name + "_se")
    # L&L first-order threshold (Mechanics §27, with friction), written out here rather than taken from our
    # stability module: h_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2), a_c = h_c / k
    f0, zeta, k = fit.f0_hz, fit.zeta, fit.k_per_unit
    assert fit.amp_threshold * k == pytest.approx(2 * math.sqrt(((25.0 - 2 * f0) / f0) ** 2 + 4 * zeta**2),
                                                  rel=1e-9)
    # the unstable band at h = k a: |f - 2 f0| < f0 sqrt(h^2 / 4 - 4 zeta^2) (same section)
    half = f0 * math.sqrt((k * 0.25) ** 2 / 4 - 4 * zeta**2)
    assert fit.unstable_band_hz == pytest.approx((2 * f0 - half, 2 * f0 + half), rel=1e-9)
    assert st.tongue_edges_first_order(f0, zeta, k * 0.25) == pytest.approx(fit.unstable_band_hz, rel=1e-12)
    assert fit.margin_pct == pytest.approx(100 * (1 - 0.25 / fit.amp_threshold), rel=1e-12)
    assert fit.amp_threshold_lo < fit.amp_threshold < fit.amp_threshold_hi


def test_margin_interval_covers_the_truth_over_seeds():
    truth_ac = st.threshold_first_order(12.4, 0.012, 24.0) / 0.25
    covered = 0
    for seed in range(12):
        fit = _fit(simulate_history(600, seed=100 + seed, **TRUTH), speed=24.0)
        assert fit.status in ("fit", "weakly_constrained")
        covered += fit.amp_threshold_lo <= truth_ac <= fit.amp_threshold_hi
    assert covered >= 9  # nominal 90 % of 12 is 10.8


def test_growth_rates_sharpen_the_damping_estimate():
    h = simulate_history(800, seed=4, **TRUTH)
    with_g = _fit(h)
    without = _fit(h, growth=False)
    assert with_g.n_growth > 20 and without.n_growth == 0
    assert with_g.zeta_se < without.zeta_se


def test_says_when_the_data_do_not_constrain_the_fit():
    h = simulate_history(400, seed=5, **TRUTH)
    few = fit_operating_window(
        h["speed_hz"][:6], h["amp_1x"][:6], h["present"][:6], today_speed_hz=25.0, today_amp_1x=0.2
    )
    assert few.status == "not_enough_data" and few.f0_hz is None
    absent = fit_operating_window(
        h["speed_hz"], h["amp_1x"], np.zeros(400), today_speed_hz=25.0, today_amp_1x=0.2
    )
    assert absent.status == "no_onset_seen" and "do not constrain" in absent.message
    one = simulate_history(400, seed=6, speed_range_hz=(24.0, 24.05), **TRUTH)
    fit = _fit(one, speed=24.02, amp=0.2)
    assert fit.status == "one_speed" and fit.f0_hz is None and fit.unstable_band_hz is None
    truth_ac = st.threshold_first_order(12.4, 0.012, 24.02) / 0.25
    assert fit.amp_threshold == pytest.approx(truth_ac, rel=0.05)
    with pytest.raises(ValueError, match="today_amp_1x"):
        fit_operating_window([1.0], [1.0], [1.0], today_speed_hz=1.0, today_amp_1x=-1.0)


def test_cli_window(tmp_path, capsys):
    h = simulate_history(1000, seed=8, **TRUTH)
    rows = ["time,speed_hz,amp_1x,amp_sub,present,growth_rate_per_s"]
    for i in range(1000):
        g = "" if np.isnan(h["growth_rate_per_s"][i]) else f"{h['growth_rate_per_s'][i]:.5g}"
        rows.append(
            f"{h['time_days'][i] * 86400:.0f},{h['speed_hz'][i]:.5f},{h['amp_1x'][i]:.6g},"
            f"{h['amp_sub'][i]:.6g},{int(h['present'][i])},{g}"
        )
    path = tmp_path / "history.csv"
    path.write_text("\n".join(rows) + "\n")
    assert cli_main(["window", str(path), "--speed-hz", "25", "--amp-1x", "0.25"]) == 0
    out = capsys.readouterr().out
    assert "margin to onset" in out and "unstable speed band" in out
    assert "At today's 1X acceleration of 0.25 units of the amp_1x column peak, speeds from" in out
    assert "manufacturer" in out  # the caution of analysis.window.conclusion
    assert cli_main(["window", str(path), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["status"] == "fit" and d["f0_hz"] == pytest.approx(12.4, rel=0.01)
    (tmp_path / "nolabels.csv").write_text("time,speed_hz,amp_1x\n0,25,0.2\n")
    assert cli_main(["window", str(tmp_path / "nolabels.csv")]) == 2
    assert "present" in capsys.readouterr().err
    # labels derived from the subharmonic amplitude instead of a present column
    unlabelled = tmp_path / "amp_only.csv"
    unlabelled.write_text("\n".join(",".join(r.split(",")[:4]) for r in rows) + "\n")
    assert cli_main(["window", str(unlabelled), "--json", "--present-above", "0.004"]) == 0
    d2 = json.loads(capsys.readouterr().out)
    assert d2["n_present"] == d["n_present"] and d2["n_growth"] == 0  # no growth column in this file
    assert d2["f0_hz"] == pytest.approx(d["f0_hz"], rel=0.01)


def test_simulated_history_csv_feeds_window_and_trend(tmp_path, capsys):
    out = tmp_path / "hist.csv"
    assert cli_main(["simulate", "history", "--out", str(out), "--seed", "3", "--set", "n=400"]) == 0
    truth = json.loads(out.with_suffix(".json").read_text())
    assert truth["f0_hz"] == 12.4 and "not measurements" in truth["note"]
    capsys.readouterr()
    assert cli_main(["window", str(out), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["n_records"] == 400 and d["f0_hz"] == pytest.approx(12.4, rel=0.01)
    assert cli_main(["trend", str(out), "--limit", "0.05", "--json"]) == 0
    t = json.loads(capsys.readouterr().out)
    assert t["n_total"] == 400 and t["n_other_speed"] > 0  # like with like: other speeds left out
    assert cli_main(["simulate", "history", "--out", str(tmp_path / "h.wav")]) == 2
