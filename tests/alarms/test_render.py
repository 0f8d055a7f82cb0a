"""Email wording, suggested checks, HTML escaping, and state-machine properties (hypothesis)."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from server.alarms.engine import run
from server.alarms.render import alarm_email, describe_finding, digest_email
from server.alarms.rules import RuleSpec
from server.alarms.suggestions import CAUTIONS, suggested_checks

SQRT2 = 2 ** 0.5


def finding(klass="half-order", family=None, velocity_peak=3.2 * SQRT2, zone="C"):
    return {
        "subharmonic": {"detected": True, "class": klass, "frequency_hz": 14.8, "order": 0.5,
                        "velocity_mm_s": velocity_peak, "family": family or {}},
        "growth": {"rate_per_s": 0.9, "ci95_per_s": [0.7, 1.1], "state": "growing"},
        "overall": {"velocity_rms_mm_s": 3.9, "zone": zone},
    }


def test_finding_in_the_trades_words():
    assert describe_finding(finding()) == (
        "half-order component at 14.8 Hz (0.50X), 3.2 mm/s r.m.s., growing 0.9 /s; "
        "zone C (3.9 mm/s r.m.s. overall)"
    )
    calm = {"subharmonic": {"detected": False}, "overall": {"zone": "A", "velocity_rms_mm_s": 0.8}}
    assert describe_finding(calm) == "no subharmonic line detected; zone A (0.8 mm/s r.m.s. overall)"


def test_suggested_checks_by_kind_of_finding():
    # Common practice (no source): rub/looseness for a half-order family, oil film for whirl.
    rub = " ".join(suggested_checks(finding(family={"1.5X": 0.3})))
    assert "rub" in rub and "looseness" in rub and "unstable speed band" in rub
    whirl = " ".join(suggested_checks(finding(klass="sub-synchronous")))
    assert "oil" in whirl and "clearance" in whirl and "load" in whirl
    assert "rub" not in whirl
    assert "sensor" in " ".join(suggested_checks({}, data_quality=True))


def _event(asset="Pump <A&B>"):
    where = {"site": "Works", "area": "Area 1", "asset": asset, "asset_id": 7, "point": "DE-H",
             "point_id": 3}
    metrics = {"half_order_velocity": 1.6, "time_to_limit_days": 12.0}
    details = {"where": where, "finding": finding(), "metrics": metrics,
               "previous": {"half_order_velocity": 1.2}, "half_order_danger": 2.8}
    return {"kind": "transition", "metric": "half_order_velocity", "from_level": "normal",
            "to_level": "alert", "value": 1.6, "threshold": 1.4, "record_id": 11, "summary": "",
            "created_at": "2026-11-02 12:00 UTC", "details": details}


def test_alarm_email_parts_and_escaping():
    subject, text, html = alarm_email([_event()], base_url="https://cm.example.test/")
    assert subject == "[halfwatch] ALERT: Pump <A&B> / DE-H - half-order velocity r.m.s."
    assert "half-order 1.2 -> 1.6 mm/s r.m.s. (+33%)" in text
    assert "about 12 days to the danger level (2.8 mm/s r.m.s.) at the present trend" in text
    assert "https://cm.example.test/assets/7" in text
    assert "Pump &lt;A&amp;B&gt;" in html and "<A&B>" not in html
    for caution in CAUTIONS:
        assert caution in text


def test_subject_says_cleared_or_down():
    event = _event()
    event.update(from_level="alert", to_level="normal")
    assert alarm_email([event], base_url="x")[0].startswith("[halfwatch] CLEARED: Pump <A&B> / DE-H")
    event.update(from_level="danger", to_level="alert")
    assert alarm_email([event], base_url="x")[0].startswith("[halfwatch] down to ALERT: ")


def test_detailed_forecast_and_unstable_band_in_the_email():
    event = _event()
    event["details"]["forecast"] = {"status": "forecast", "model": "exponential", "days_to_limit": 9.4,
                                    "days_to_limit_lo": 6.2, "days_to_limit_hi": 15.8}
    event["details"]["metrics"]["threshold_margin"] = 0.18
    event["details"]["window"] = {"unstable_band_hz": [48.91, 51.07]}
    _s, text, _h = alarm_email([event], base_url="https://cm.example.test")
    assert "about 9 days to the danger level (2.8 mm/s r.m.s.) (90 % interval 6 to 16 days)" in text
    assert "18 % below the instability threshold; unstable forcing band 48.91 to 51.07 Hz" in text


def test_digest_table_orders_danger_first():
    rows = [{"level": "danger", "asset": "P1", "point": "DE", "rule": "half-order velocity",
             "value": "3.1 mm/s", "since": "2026-11-02 12:00 UTC", "status": "open"},
            {"level": "alert", "asset": "P2", "point": "NDE", "rule": "overall velocity", "value": "3.0 mm/s",
             "since": "2026-11-02 13:00 UTC", "status": "acknowledged by engineer1"}]
    subject, text, html = digest_email(rows, scope_name="site Works", local_date="2026-11-03",
                                       base_url="https://cm.example.test", changes_24h=3)
    assert subject.endswith("2 machine(s) in alarm, 1 in danger (2 rule(s))")
    table = [ln.strip() for ln in text.splitlines() if ln.strip().startswith(("DANGER", "ALERT"))]
    assert table == [table[0], table[1], table[2], table[3]] and table[0] == "DANGER: P1 (1 rule(s))"
    assert table[2] == "ALERT: P2 (1 rule(s))" and "acknowledged" in table[3]
    assert "transitions in the last 24 h: 3" in text and html.count("<tr>") == 4  # a header and a row each


values = st.lists(st.floats(min_value=0.0, max_value=6.0, allow_nan=False), min_size=1, max_size=60)


@settings(max_examples=200, deadline=None)
@given(values)
def test_without_persistence_the_level_is_the_reading(vals):
    rule = RuleSpec("half_order_velocity", 1.4, 2.8, k=1, n=1, hysteresis=0.0)
    expected = ["danger" if v >= 2.8 else "alert" if v >= 1.4 else "normal" for v in vals]
    assert run(rule, vals) == expected


@settings(max_examples=200, deadline=None)
@given(values, st.integers(min_value=0, max_value=59), st.floats(min_value=0.0, max_value=6.0))
def test_one_outlier_never_changes_a_settled_level_with_2_of_3(vals, where, outlier):
    # A level reached by 3 equal readings does not move on one different reading (k = 2, n = 3).
    rule = RuleSpec("half_order_velocity", 1.4, 2.8, k=2, n=3, hysteresis=0.1)
    settled = run(rule, [vals[0]] * 3)[-1]
    assert run(rule, [vals[0]] * 3 + [outlier])[-1] == settled


@pytest.mark.parametrize("x", [3.82e-5, -0.00123, 0.547, 5.789, 12.34, 999.4, 12345.6, 1.0, 0.1])
def test_values_are_plain_numbers_to_three_significant_digits(x):
    from server.alarms.rules import plain_number, value_text

    text = plain_number(x)
    assert "e" not in text.lower()  # positional, never "3.82e-05"
    # the same value as Python's own rounding to 3 significant digits ("g" format; units from 10^3 up)
    assert float(text) == (round(x) if abs(x) >= 1000 else float(f"{x:.3g}"))
    assert value_text("growth_rate", 3.82e-5) == "0.0000382 1/s"
    assert value_text("half_order_ratio", 0.547) == "0.547 × 1X (peak / peak)"  # acceleration peaks
