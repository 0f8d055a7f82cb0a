"""Default rule levels against ISO 20816 zone boundaries, and the pure trend/quality checks.

Zone boundaries: ISO 20816-3 (and ISO 10816-3:2009) Annex A, broad-band velocity r.m.s., values from
memory (to be verified against the purchased standard). Operational-limit guidance of the same
standard, from memory: an alarm is not set above 1.25 x the B/C boundary, a trip not above 1.25 x the
C/D boundary.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from server.alarms.checks import NO_FORECAST_DAYS, data_quality_problem, trend_and_forecast
from server.alarms.rules import ISO_ZONE_LIMITS_MM_S, default_rules, zone_limits

# ISO 20816-3 Annex A (from memory): (group, support) -> (A/B, B/C, C/D) in mm/s r.m.s.
ISO_20816_3 = {
    (1, "rigid"): (2.3, 4.5, 7.1),
    (1, "flexible"): (3.5, 7.1, 11.0),
    (2, "rigid"): (1.4, 2.8, 4.5),
    (2, "flexible"): (2.3, 4.5, 7.1),
}


@pytest.mark.parametrize("key", sorted(ISO_20816_3))
def test_zone_table_matches_iso_20816_3(key):
    assert ISO_ZONE_LIMITS_MM_S[key] == ISO_20816_3[key]


@pytest.mark.parametrize("key", sorted(ISO_20816_3))
def test_default_levels_sit_on_zone_boundaries_within_the_guidance(key):
    ab, bc, cd = ISO_20816_3[key]
    rules = {r.metric: r for r in default_rules(group=key[0], support=key[1])}
    # Overall level: alert on entering zone C, danger on entering zone D (ISO 20816 zones).
    overall = rules["overall_velocity"]
    assert overall.zone_based
    alert, danger = overall.levels({"overall": {"zone_limits_mm_s": list(ISO_20816_3[key])}})
    assert (alert, danger) == (bc, cd)
    assert alert <= 1.25 * bc and danger <= 1.25 * cd  # operational-limit guidance (from memory)
    # The half-order line alone: alert at A/B, danger at B/C (house choice, tied to the same zones).
    half = rules["half_order_velocity"]
    assert (half.alert, half.danger) == (ab, bc)


def test_zone_limits_fall_back_to_the_table():
    assert zone_limits({}, group=1, support="flexible") == (3.5, 7.1, 11.0)
    assert zone_limits({"overall": {"zone_limits_mm_s": [2.3, 4.5, 7.1]}}) == (2.3, 4.5, 7.1)


def test_every_default_rule_is_valid_and_has_two_levels():
    rules = default_rules()
    for r in rules:
        r.validate()
    assert len({r.metric for r in rules}) == len(rules) == 7


def test_trend_matches_scipy_theilslopes_and_forecast_is_exact():
    # ln A = ln 0.5 + r d with r = 0.2 /day: dB/day = 20 log10(e) x 0.2 = 1.737 (definition of the dB).
    days = np.arange(10, dtype=float)
    amp = 0.5 * np.exp(0.2 * days)
    history = [[d * 86400.0, a] for d, a in zip(days, amp, strict=True)]
    db_day, ttl = trend_and_forecast(history, limit=10.0)
    ref = stats.theilslopes(np.log(amp), days)[0]  # scipy reference
    assert db_day == pytest.approx(20 / math.log(10) * ref, rel=1e-12)
    assert db_day == pytest.approx(1.7372, abs=1e-4)
    assert ttl == pytest.approx((math.log(10.0) - math.log(amp[-1])) / 0.2, rel=1e-9)


def test_theil_sen_equals_scipy_theilslopes_on_noisy_uneven_data():
    # Slope and intercept against scipy.stats.theilslopes (method "separate": intercept =
    # median(y) - slope x median(x)), on uneven times with repeated time stamps and a stray reading.
    from server.alarms.checks import theil_sen

    rng = np.random.default_rng(3)
    for n in (4, 7, 30):
        x = np.sort(rng.uniform(0.0, 9.0, n))
        x[1] = x[0]  # two readings at the same time: their pair has no slope
        y = -1.0 + 0.15 * x + 0.05 * rng.standard_normal(n)
        y[n // 2] += 2.0
        ref = stats.theilslopes(y, x)
        slope, intercept = theil_sen(list(x), list(y))
        assert slope == pytest.approx(ref.slope, rel=1e-12)
        assert intercept == pytest.approx(ref.intercept, rel=1e-12, abs=1e-12)


def test_trend_is_robust_to_one_stray_reading():
    days = np.arange(12, dtype=float)
    amp = 0.5 * np.exp(0.1 * days)
    amp[6] *= 8.0  # a stray reading
    db_day, _ = trend_and_forecast([[d * 86400.0, a] for d, a in zip(days, amp, strict=True)], limit=None)
    assert db_day == pytest.approx(20 / math.log(10) * 0.1, rel=0.05)


def test_trend_without_a_current_line_or_enough_readings():
    assert trend_and_forecast([[0.0, 1.0], [86400.0, 0.0]], limit=2.8) == (0.0, NO_FORECAST_DAYS)
    assert trend_and_forecast([[0.0, 1.0], [86400.0, 1.1]], limit=2.8) == (None, None)


def test_data_quality_reasons():
    good = {"quality": {"ok": True, "flags": []}, "forcing": {"frequency_hz": 24.8}}
    assert data_quality_problem(good, usual_speeds_hz=[24.7, 24.8, 24.9], nominal_forcing_hz=24.75) is None
    clipped = {**good, "quality": {"ok": False, "flags": ["clipping"]}}
    assert "clipping" in data_quality_problem(clipped, usual_speeds_hz=[], nominal_forcing_hz=None)
    info_only = {**good, "quality": {"ok": True, "flags": ["too-short-for-resolution"]}}
    assert data_quality_problem(info_only, usual_speeds_hz=[], nominal_forcing_hz=None) is None
    slow = {**good, "forcing": {"frequency_hz": 20.0}}
    assert "usual" in data_quality_problem(slow, usual_speeds_hz=[24.7, 24.8, 24.9], nominal_forcing_hz=None)
    assert "nominal" in data_quality_problem(slow, usual_speeds_hz=[], nominal_forcing_hz=30.0)
