"""One incident per machine: one email per escalation listing every rule, one clear; the margin rule's dwell;
the email leads with the evidence-ranked cause and the speed band; incident-wide acknowledge and shelve.

Real SQLite file, real aiosmtpd (tests/alarms/conftest.py), the worker's own evaluation (Feeder).
"""

from __future__ import annotations

import datetime as dt
import math

import pytest
from alarms.helpers import T0, make_result
from sqlalchemy import select

from server.alarms import incident_actions, service
from server.alarms.mailer import run_mailer_once
from server.alarms.service import AlarmInputError
from server.alarms.suggestions import ranked_causes
from server.alarms.tables import AlarmEvent, AlarmIncident, AlarmPointStatus, AlarmState, OutboxMessage

# The operating-window fit the margin rule reads (invented): f0 12.375 Hz, zeta 0.01, k 0.1 per m/s2, so
# at exact tuning (24.75 Hz) the threshold 1X amplitude is a_c = 4 zeta / k = 0.4 m/s2 (first-order
# Mathieu threshold with damping: Landau & Lifshitz, Mechanics, 3rd ed., section 27). The helper's 1X
# acceleration peak is one_x_v x 0.1, so one_x_v 2.0 -> margin 0.5, 3.4 -> 0.15, 3.9 -> 0.025, 4.4 -> -0.1.
F0, ZETA, K = 12.375, 0.01, 0.1
FIT = {"status": "fit", "f0_hz": F0, "zeta": ZETA, "k_per_unit": K, "unstable_band_hz": [24.6, 24.9],
       "param_cov": [[1e-6, 0.0, 0.0], [0.0, 1e-4, 0.0], [0.0, 0.0, 1e-4]], "observed_hz": [23.0, 26.0]}


def _subscribe(db, plant, email="planner@example.test", **kw):
    return service.create_subscription(db, {"email": email, "scope": "site", "scope_id": plant.site_id, **kw},
                                       actor="admin1")


def _with_fit(db, feeder, plant):
    feeder.feed(plant.point_id, make_result(half_v=0.2))  # creates the point's status row
    with db.unit_of_work() as s:
        s.get(AlarmPointStatus, plant.point_id).window_fit = dict(FIT)


def _incident_mail(db):
    with db.read() as s:
        rows = s.scalars(select(OutboxMessage).where(OutboxMessage.kind == "incident")
                         .order_by(OutboxMessage.id))
        return [(m.payload["incident"]["change"], m.recipient) for m in rows]


def test_a_flapping_margin_gives_one_email_per_escalation_and_one_clear(feeder, plant, migrated_db):
    db = migrated_db
    _subscribe(db, plant)
    _subscribe(db, plant, "manager@example.test", min_level="danger")
    _with_fit(db, feeder, plant)
    # scatter around the danger level for two days, every 6 h (house scenario, invented)
    flap = [3.4, 3.4, 3.4, 3.9, 3.9, 3.9, 3.4, 3.9, 3.4, 3.9, 3.4, 3.9, 3.4, 3.9]
    for one_x in flap:
        feeder.feed(plant.point_id, make_result(half_v=0.2, one_x_v=one_x))
    with db.read() as s:
        margin_events = s.scalars(select(AlarmEvent).where(AlarmEvent.metric == "threshold_margin")).all()
    assert [(e.from_level, e.to_level) for e in margin_events] == [("normal", "alert"), ("alert", "danger")]
    assert _incident_mail(db) == [("alert", "planner@example.test"), ("danger", "planner@example.test"),
                                  ("danger", "manager@example.test")]
    # far from the threshold again for more than the two-day dwell: the incident clears once
    for _ in range(12):
        feeder.feed(plant.point_id, make_result(half_v=0.2, one_x_v=2.0))
    with db.read() as s:
        [incident] = s.scalars(select(AlarmIncident)).all()
    assert incident.cleared_at is not None and incident.peak_level == "danger"
    mails = _incident_mail(db)
    assert mails[3:] == [("clear", "planner@example.test"), ("clear", "manager@example.test")]
    assert incident.emails == len(mails) == 5


def test_two_points_of_a_machine_are_one_incident(feeder, plant, migrated_db, smtp, mail_settings):
    db = migrated_db
    _subscribe(db, plant)
    for v in (0.2, 1.6, 1.7):  # the drive end: half-order line into alert (A/B boundary 1.4 mm/s r.m.s.)
        feeder.feed(plant.point_id, make_result(half_v=v))
    for v in (3.0, 3.1):  # the non-drive end: overall into zone C (alert) on the same machine
        feeder.feed(plant.point_ids["P1-NDE-V"], make_result(overall=v))
    assert run_mailer_once(db, mail_settings) == 1  # the second rule joined an incident already at alert
    for v in (4.6, 4.7):  # ... then zone D (danger) at the non-drive end
        feeder.feed(plant.point_ids["P1-NDE-V"], make_result(overall=v))
    assert run_mailer_once(db, mail_settings) == 1
    with db.read() as s:
        assert s.query(AlarmIncident).count() == 1
    first, second = (m["msg"] for m in smtp.messages)
    assert str(first["Subject"]).strip().startswith("[halfwatch] ALERT: CW pump 1 / P1-DE-H - half-order")
    assert str(second["Subject"]).strip().startswith(
        "[halfwatch] DANGER: CW pump 1 / P1-NDE-V - overall velocity r.m.s. (ISO 20816 zone) (+")
    text = second.get_body(preferencelist=("plain",)).get_content().replace("\r\n", "\n")
    rules = text.split("Rules of this machine now:")[1].split("\n\n")[0]
    assert "DANGER  P1-NDE-V: overall velocity" in rules and "ALERT   P1-DE-H: half-order velocity" in rules
    assert "Priority: high; act by " in text  # danger: within 2 days (house choice, docs/alarms.md)


def test_the_email_leads_with_the_parametric_cause_and_the_speed_band(feeder, plant, migrated_db, smtp,
                                                                      mail_settings):
    db = migrated_db
    _subscribe(db, plant)
    _with_fit(db, feeder, plant)
    family = {"1.5X": 0.3, "2.5X": 0.2}  # lines that rub and looseness also give
    for _ in range(3):
        feeder.feed(plant.point_id, make_result(half_v=0.5, one_x_v=4.4, family=family))
    assert run_mailer_once(db, mail_settings) == 1
    text = smtp.messages[0]["msg"].get_body(preferencelist=("plain",)).get_content().replace("\r\n", "\n")
    lead = text.split("\n\n")[0]
    assert "Most likely cause: Parametric instability at this speed, because" in lead
    assert "margin -10 %" in lead  # 1 - 0.44 / 0.4, as a percentage
    # the unstable band at a = 0.44 m/s2: |f - 2 f0| < f0 sqrt((k a / 2)^2 - 4 zeta^2)
    # (Landau & Lifshitz, Mechanics, 3rd ed., section 27), computed here independently
    half = F0 * math.sqrt((K * 0.44 / 2) ** 2 - 4 * ZETA**2)
    band = f"{2 * F0 - half:.2f} to {2 * F0 + half:.2f} Hz"
    assert f"Today's speed: 24.75 Hz forcing (1X) (1485 r/min); inside the unstable band {band}" in text
    assert "Stable speeds: below " in text and "Skipped speed range for a variable-speed drive: " in text
    assert "Last speed change: none in the last 120 days" in text
    assert "Other possible causes:\n  - Rub or mechanical looseness" in text
    assert "manufacturer's limits" in text and "lockout/tagout" in text  # the cautions


def test_causes_ranked_by_evidence():
    # common practice in machinery diagnostics: a line locked at 0.5X with 1.5X/2.5X is also what rub and
    # looseness give; a line at 0.38-0.48X not locked to 0.5X is fluid-film whirl (from memory, e.g.
    # Muszynska, Rotordynamics, 2005, ch. 4)
    half = {"subharmonic": {"detected": True, "class": "half-order", "order": 0.5,
                            "family": {"1.5X": 0.3, "2.5X": 0.1}}, "growth": {}}
    at = dt.datetime(2026, 12, 1, tzinfo=dt.UTC)
    beyond = {"window": {"inside": True, "band_hz": [24.6, 24.9], "speed_hz": 24.75},
              "speed_change": {"t": "2026-10-28T08:00:00+00:00", "from_hz": 24.0, "to_hz": 25.4}}
    ranked = ranked_causes(half, {"threshold_margin": -0.06}, beyond, at=at)
    assert [c.key for c in ranked][:2] == ["parametric", "rub-looseness"]
    assert any("2026-10-28" in why for why in ranked[0].why)  # the speed change, said as evidence
    no_fit = ranked_causes(half, {}, {}, at=at)
    assert no_fit[0].key == "rub-looseness" or no_fit[0].score == no_fit[1].score
    whirl = {"subharmonic": {"detected": True, "class": "sub-synchronous", "order": 0.43}, "growth": {}}
    got = ranked_causes(whirl, {}, {}, at=at)
    assert got[0].key == "whirl" and "0.43X" in got[0].why[0]


def test_incident_acknowledge_and_shelve_cover_every_open_rule(feeder, plant, migrated_db):
    db = migrated_db
    pump = plant.asset_ids["pump"]
    for v in (0.2, 1.6, 1.7):
        feeder.feed(plant.point_id, make_result(half_v=v))
    for v in (3.0, 3.1):
        feeder.feed(plant.point_ids["P1-NDE-V"], make_result(overall=v))
    [inc] = incident_actions.list_incidents(db, view="active")
    assert inc["asset"] == "CW pump 1" and len(inc["rules"]) >= 2 and inc["incident_id"] is not None
    assert all(r["value_text"] for r in inc["rules"])
    out = incident_actions.acknowledge_incident(db, pump, actor="eng", comment="bearing check booked")
    assert out["changed"] == len(inc["rules"])
    with db.read() as s:
        states = s.scalars(select(AlarmState).where(AlarmState.asset_id == pump,
                                                    AlarmState.level != "normal")).all()
    assert all(st.acked_level == st.level for st in states)
    assert incident_actions.list_incidents(db, view="active") == []
    assert [i["state"] for i in incident_actions.list_incidents(db, view="all")] == ["acknowledged"]
    with pytest.raises(AlarmInputError) as bad:
        incident_actions.shelve_incident(db, pump, actor="eng", until=T0 - dt.timedelta(days=1), reason="x")
    assert bad.value.field == "until"
    with pytest.raises(AlarmInputError) as none_open:
        incident_actions.acknowledge_incident(db, plant.asset_ids["recip"], actor="eng", comment="x")
    assert none_open.value.status == 409 and "Air compressor 2" in str(none_open.value)


def test_rules_open_before_incidents_existed_send_no_email_on_a_drop(feeder, plant, migrated_db):
    from sqlalchemy import delete

    db = migrated_db
    for v in (0.2, 3.0, 3.1):  # half-order line into danger (B/C boundary 2.8 mm/s r.m.s.)
        feeder.feed(plant.point_id, make_result(half_v=v))
    with db.unit_of_work() as s:  # as a database upgraded to 0009 with this alarm already open
        s.execute(delete(OutboxMessage))
        s.execute(delete(AlarmIncident))
    _subscribe(db, plant)
    for v in (2.0, 2.0):  # back below the danger clearing level (90 % of 2.8), above the alert level
        feeder.feed(plant.point_id, make_result(half_v=v))
    with db.read() as s:
        [incident] = s.scalars(select(AlarmIncident)).all()
    assert incident.level == "alert" and _incident_mail(db) == []  # the drop is not mailed
    for v in (0.2, 0.2):
        feeder.feed(plant.point_id, make_result(half_v=v))
    assert _incident_mail(db) == [("clear", "planner@example.test")]


def test_digest_rows_name_the_whirl_line_and_give_the_margin_in_percent(feeder, plant, migrated_db):
    from server.alarms.digest import open_alarm_rows

    db = migrated_db
    _with_fit(db, feeder, plant)
    for _ in range(3):  # margin 1 - 0.44 / 0.4 = -10 %: danger (5 % level, "below" rule)
        feeder.feed(plant.point_id, make_result(half_v=0.2, one_x_v=4.4))
    for v in (0.2, 2.5, 2.6):  # the compressor (ISO group 1: A/B boundary 2.3 mm/s r.m.s.) whirls at 0.43X
        data = make_result(half_v=v, f1x=25.0, klass="sub-synchronous")
        data["subharmonic"].update(order=0.43, frequency_hz=0.43 * 25.0)
        feeder.feed(plant.point_ids["C2-CYL-A"], data)
    with db.read() as s:
        rows = open_alarm_rows(s, "site", plant.site_id)
    assert [r["asset"] for r in rows] == sorted((r["asset"] for r in rows), key=["CW pump 1",
                                                                                 "Air compressor 2"].index)
    margin = [r for r in rows if r["metric"] == "threshold_margin"]
    assert margin and margin[0]["value"] == "-10 % (beyond the threshold)"
    whirl = [r for r in rows if r["asset"] == "Air compressor 2" and r["metric"] == "half_order_velocity"]
    assert whirl and whirl[0]["rule"] == "sub-synchronous whirl line (0.43X) velocity r.m.s."
