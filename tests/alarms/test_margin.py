"""The threshold-margin rule: closed-form margin from a stored operating-window fit, and the refresh."""

from __future__ import annotations

import pytest
from alarms.helpers import make_result
from sqlalchemy import select

from server.alarms.margin import NO_FIT, margin_from_fit, refresh_window_fits
from server.alarms.tables import AlarmPointStatus, AlarmState


def test_margin_at_exact_tuning_is_one_minus_a_over_4_zeta_over_k():
    # First-order damped Mathieu at exact tuning (forcing = 2 f0): h_c = 4 zeta (Landau & Lifshitz
    # §27, with friction). With h = k a: a_c = 4 zeta / k = 0.4 here.
    fit = {"f0_hz": 25.0, "zeta": 0.01, "k_per_unit": 0.1}
    assert margin_from_fit(fit, 50.0, 0.3) == pytest.approx(0.25)
    assert margin_from_fit(fit, 50.0, 0.4) == pytest.approx(0.0, abs=1e-12)
    # Detuned by 2 %: h_c = 2 sqrt(0.02^2 + 4 zeta^2) = 0.056569 (same formula).
    assert margin_from_fit(fit, 50.5, 0.3) == pytest.approx(1 - 0.3 / (2 * (0.02**2 + 4e-4) ** 0.5 / 0.1))
    assert margin_from_fit({"f0_hz": None}, 50.0, 0.3) is None


def _margin_state(db, point_id):
    with db.read() as s:
        return s.scalars(select(AlarmState).where(AlarmState.point_id == point_id,
                                                  AlarmState.metric == "threshold_margin")).one()


def test_margin_rule_follows_a_stored_fit(feeder, plant, migrated_db):
    feeder.feed(plant.point_id, make_result(half_v=0.2, f1x=24.75))
    with migrated_db.unit_of_work() as s:
        s.get(AlarmPointStatus, plant.point_id).window_fit = {
            "status": "fit", "f0_hz": 12.375, "zeta": 0.01, "k_per_unit": 0.1,
            "unstable_band_hz": [24.6, 24.9]}
    # a_c at exact tuning = 0.4; the helper's 1X amplitude is one_x_v x 0.1 -> margins 0.5, 0.15, 0.025.
    # The margin rule needs 3 of 4 (like the slow trend rules): alert at the 4th, danger at the 7th.
    got = []
    for i, one_x in enumerate((2.0, 3.4, 3.4, 3.4, 3.9, 3.9, 3.9), start=1):
        events = feeder.feed(plant.point_id, make_result(half_v=0.2, f1x=24.75, one_x_v=one_x))
        got += [(i, e[3], e[4]) for e in events if e[2] == "threshold_margin"]
    assert got == [(4, "normal", "alert"), (7, "alert", "danger")]
    # Scatter back across the danger level (0.15, 0.025, ...) does not drop it: 3 of 4 beyond 7.5 % are
    # needed, and the level is held for two days (readings every 6 h here).
    for one_x in (3.4, 3.9, 3.4, 3.4, 3.4, 3.4):
        events = feeder.feed(plant.point_id, make_result(half_v=0.2, f1x=24.75, one_x_v=one_x))
        assert [e for e in events if e[2] == "threshold_margin"] == []
    assert _margin_state(migrated_db, plant.point_id).level == "danger"
    assert _margin_state(migrated_db, plant.point_id).inactive_reason is None


def test_weak_fit_leaves_the_rule_inactive_with_its_reason(feeder, plant, migrated_db):
    feeder.feed(plant.point_id, make_result(half_v=0.2))
    with migrated_db.unit_of_work() as s:
        s.get(AlarmPointStatus, plant.point_id).window_fit = {"status": "weakly_constrained",
                                                               "message": "add records at other speeds"}
    feeder.feed(plant.point_id, make_result(half_v=0.2))
    reason = _margin_state(migrated_db, plant.point_id).inactive_reason
    assert reason.startswith(NO_FIT) and "other speeds" in reason


def test_refresh_stores_a_fit_after_enough_records(feeder, plant, migrated_db):
    from analysis.physics.window import fit_operating_window

    # Invented history: speeds 24.0-25.5 Hz, 1X amplitudes, half-order present above a tongue edge.
    speeds = [24.0, 24.3, 24.6, 24.75, 24.9, 25.2, 25.5, 24.5, 24.75, 25.0, 24.2, 24.8]
    amps = [2.0, 3.0, 4.0, 4.5, 4.0, 3.0, 2.0, 5.0, 1.0, 4.8, 4.9, 2.5]
    present = [a >= 3.5 and abs(f - 24.75) < 0.35 for f, a in zip(speeds, amps, strict=True)]
    for f, a, p in zip(speeds, amps, present, strict=True):
        feeder.feed(plant.point_id, make_result(half_v=1.0 if p else 0.0, f1x=f, one_x_v=a))
    assert refresh_window_fits(migrated_db) == 1
    with migrated_db.read() as s:
        fit = s.get(AlarmPointStatus, plant.point_id).window_fit
    # the stored fit is the fit of exactly these readings (1X acceleration peak = 0.1 x velocity here,
    # alarms.helpers), read back from the typed columns in time order
    ref = fit_operating_window(speeds, [0.1 * a for a in amps], [1.0 if p else 0.0 for p in present],
                               growth_rate_per_s=[float("nan")] * len(speeds),
                               today_speed_hz=speeds[-1], today_amp_1x=0.1 * amps[-1]).to_dict()
    assert fit["n_results"] == 12 and fit["status"] == ref["status"]
    for key in ("f0_hz", "zeta", "k_per_unit", "margin_pct"):
        assert fit[key] == pytest.approx(ref[key], rel=1e-9, abs=1e-12), key
    if fit["status"] == "fit":  # the tongue is centred where the invented line appeared: 2 f0 near 24.75 Hz
        assert 2 * fit["f0_hz"] == pytest.approx(24.75, abs=0.5)
    assert refresh_window_fits(migrated_db) == 0  # nothing new: no refit
