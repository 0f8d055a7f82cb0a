"""The engine in the worker's transaction: escalation, data quality, acknowledgement, shelving, audit."""

from __future__ import annotations

import datetime as dt

import pytest
from alarms.helpers import T0, assert_audit_trail_immutable, make_result
from sqlalchemy import select, text

from server.alarms import service
from server.alarms.tables import AlarmEvent, AlarmState, OutboxMessage

ONSET = [0.2, 0.3, 1.5, 1.6, 1.9, 3.0, 3.2, 3.5]  # half-order mm/s, an invented onset


def transitions(events, metric="half_order_velocity"):
    return [(e[3], e[4]) for e in events if e[1] == "transition" and e[2] == metric]


def test_onset_raises_alert_then_danger_at_the_expected_readings(feeder, plant):
    # Default half-order levels for group 2 rigid: alert 1.4 mm/s (A/B), danger 2.8 mm/s (B/C),
    # persistence 2 of 3 -> alert on the 4th reading, danger on the 7th.
    seen = {}
    for i, v in enumerate(ONSET, start=1):
        for tr in transitions(feeder.feed(plant.point_id, make_result(half_v=v))):
            seen[i] = tr
    assert seen == {4: ("normal", "alert"), 7: ("alert", "danger")}


def test_data_quality_records_raise_no_machine_alarm(feeder, plant, migrated_db):
    for v in ONSET[:3]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    # A clipped record and an impact-ridden one with a large half-order line: no machine transition.
    for flag in ("clipping", "impulsive", "flat-line", "dc-jump"):
        events = feeder.feed(plant.point_id, make_result(half_v=5.0, overall=9.0, flags=(flag,), ok=False))
        assert [e[1] for e in events] == ["data-quality"]
    # A record at 30 % above the usual speed is also a data-quality problem.
    events = feeder.feed(plant.point_id, make_result(half_v=5.0, f1x=24.75 * 1.3))
    assert [e[1] for e in events] == ["data-quality"]
    with migrated_db.read() as s:
        levels = set(s.scalars(select(AlarmState.level).where(AlarmState.point_id == plant.point_id)))
        assert levels == {"normal"}
    # The next good reading continues the window where the good readings left it (1.5 -> 1.6 alerts).
    assert transitions(feeder.feed(plant.point_id, make_result(half_v=1.6))) == [("normal", "alert")]


def test_nominal_speed_check_on_first_records(feeder, plant):
    events = feeder.feed(plant.point_id, make_result(half_v=3.0, f1x=40.0))  # nominal 24.75 Hz
    assert [e[1] for e in events] == ["data-quality"]


def _open_state(db, point_id, metric="half_order_velocity"):
    with db.read() as s:
        return s.scalars(select(AlarmState).where(AlarmState.point_id == point_id,
                                                  AlarmState.metric == metric)).one().id


def test_acknowledge_then_higher_level_re_alerts(feeder, plant, migrated_db):
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    sid = _open_state(migrated_db, plant.point_id)
    assert [a["id"] for a in service.list_alarms(migrated_db, view="active")] == [sid]
    service.acknowledge(migrated_db, sid, actor="engineer1", comment="bearing check booked for Friday")
    assert service.list_alarms(migrated_db, view="active") == []
    [acked] = service.list_alarms(migrated_db, view="acknowledged")
    assert acked["ack_comment"] == "bearing check booked for Friday" and acked["level"] == "alert"
    for v in ONSET[4:7]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    # (the steep rise also trips the trend and forecast rules: they are other alarms)
    [active] = [a for a in service.list_alarms(migrated_db, view="active") if a["id"] == sid]
    assert active["level"] == "danger" and not active["acknowledged"]
    trail = [(e["kind"], e["to_level"]) for e in service.history(migrated_db, point_id=plant.point_id)
             if e["metric"] == "half_order_velocity"]
    assert trail == [("transition", "danger"), ("acknowledged", "alert"), ("transition", "alert")]


def test_acknowledge_needs_a_comment(feeder, plant, migrated_db):
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    sid = _open_state(migrated_db, plant.point_id)
    with pytest.raises(service.AlarmInputError, match="^comment"):
        service.acknowledge(migrated_db, sid, actor="engineer1", comment="  ")


def _outbox_count(db) -> int:
    with db.read() as s:
        return s.scalar(select(text("count(*)")).select_from(OutboxMessage))


def test_shelving_holds_emails_and_lapses_on_higher_level(feeder, plant, migrated_db):
    service.create_subscription(migrated_db, {"email": "planner@example.test", "scope": "site",
                                              "scope_id": plant.site_id}, actor="admin1")
    for metric, alert, danger in (("trend_db_per_day", 1.0, 3.0), ("time_to_limit_days", 30.0, 7.0)):
        service.set_rule(migrated_db, {"point_id": plant.point_id, "metric": metric, "alert": alert,
                                       "danger": danger, "enabled": False}, actor="engineer1")
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    sid = _open_state(migrated_db, plant.point_id)
    now = T0 + dt.timedelta(days=1, hours=1)
    with pytest.raises(service.AlarmInputError, match="^until"):
        service.shelve(migrated_db, sid, actor="engineer1", until=now - dt.timedelta(hours=1),
                       reason="sensor swap", now=now)
    service.shelve(migrated_db, sid, actor="engineer1", until=now + dt.timedelta(days=30),
                   reason="sensor swap on Tuesday", now=now)
    assert [a["id"] for a in service.list_alarms(migrated_db, view="shelved", now=now)] == [sid]
    before = _outbox_count(migrated_db)
    for v in ONSET[4:7]:  # escalates to danger: the shelving was for alert, so it lapses and emails
        feeder.feed(plant.point_id, make_result(half_v=v))
    assert _outbox_count(migrated_db) == before + 1
    assert service.list_alarms(migrated_db, view="shelved") == []
    # Shelved at danger: down to alert and back up to danger sends nothing.
    service.shelve(migrated_db, sid, actor="engineer1", until=now + dt.timedelta(days=30),
                   reason="repair planned for the next outage", now=now)
    before = _outbox_count(migrated_db)
    levels = []
    for v in (2.0, 2.0, 3.5, 3.5):
        levels += transitions(feeder.feed(plant.point_id, make_result(half_v=v)))
    assert levels == [("danger", "alert"), ("alert", "danger")]
    assert _outbox_count(migrated_db) == before
    assert [a["id"] for a in service.list_alarms(migrated_db, view="shelved", now=now)] == [sid]


def test_audit_trail_cannot_be_edited(feeder, plant, migrated_db):
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    assert_audit_trail_immutable(migrated_db)
    with migrated_db.read() as s:
        assert s.scalar(select(text("count(*)")).select_from(AlarmEvent)) >= 1


def test_growth_rule_counts_only_significant_growth(feeder, plant):
    # Rates with a CI straddling zero never raise; significant ones do (2 of 3).
    for _ in range(3):
        assert transitions(feeder.feed(plant.point_id, make_result(half_v=0.5, growth=0.9, ci=(-0.2, 2.0))),
                           "growth_rate") == []
    feeder.feed(plant.point_id, make_result(half_v=0.5, growth=0.9, ci=(0.6, 1.2)))
    events = feeder.feed(plant.point_id, make_result(half_v=0.5, growth=0.9, ci=(0.6, 1.2)))
    assert transitions(events, "growth_rate") == [("normal", "danger")]


def test_zone_rule_uses_the_result_zone_limits(feeder, plant):
    # Group 2 rigid limits in the result: zone C from 2.8 mm/s, zone D from 4.5 mm/s.
    got = []
    for v in (1.0, 3.0, 3.0, 5.0, 5.0):
        got += transitions(feeder.feed(plant.point_id, make_result(overall=v)), "overall_velocity")
    assert got == [("normal", "alert"), ("alert", "danger")]


def test_zone_rule_grades_only_readings_that_cover_the_standards_band(feeder, plant, migrated_db):
    """ISO 20816-1 grades the broad-band level over 10-1000 Hz (from memory); a record sampled at 512 Hz
    reaches 10-230 Hz only, so the zone rule must not alarm on it, and says why; the same levels over the
    full band alarm (one rule of grading: analysis.record.severity.band_covers_standard)."""
    def fed(band):
        got = []
        for v in (1.0, 3.0, 3.0, 5.0, 5.0):
            res = make_result(overall=v)
            res["overall"]["band_hz"] = band
            got += transitions(feeder.feed(plant.point_id, res), "overall_velocity")
        return got

    assert fed([10.0, 230.4]) == []
    with migrated_db.read() as s:
        st = s.scalars(select(AlarmState).where(AlarmState.metric == "overall_velocity")).one()
        assert st.level == "normal" and "no zone graded" in st.inactive_reason
    assert fed([10.0, 1000.0]) == [("normal", "alert"), ("alert", "danger")]


def test_margin_rule_is_inactive_without_a_fit(feeder, plant, migrated_db):
    feeder.feed(plant.point_id, make_result(half_v=0.2))
    with migrated_db.read() as s:
        st = s.scalars(select(AlarmState).where(AlarmState.metric == "threshold_margin")).one()
        assert st.inactive_reason == "no operating-window fit for this point"


def test_trend_rule_on_a_steady_rise(feeder, plant, migrated_db):
    # +2 dB per day (x 1.2589 per day), one reading a day: trend alert (1 dB/day), not danger (3 dB/day).
    got = []
    for day in range(8):
        at = T0 + dt.timedelta(days=day)
        got += transitions(feeder.feed(plant.point_id, make_result(half_v=0.3 * 10 ** (2 * day / 20)), at=at),
                           "trend_db_per_day")
    assert got == [("normal", "alert")]
    with migrated_db.read() as s:
        st = s.scalars(select(AlarmState).where(AlarmState.metric == "trend_db_per_day")).one()
        assert st.last_value == pytest.approx(2.0, rel=1e-6)  # Theil-Sen on exact data (scipy)


def test_late_and_reanalysed_records_do_not_move_levels(feeder, plant, migrated_db):
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    # A reading from before the newest one (a route uploaded late) with a large line: no transition,
    # but it joins the history the trend is fitted to, in time order.
    late = T0 + dt.timedelta(hours=1)
    assert feeder.feed(plant.point_id, make_result(half_v=4.0), at=late) == []
    assert feeder.feed(plant.point_id, make_result(half_v=4.5), at=late) == []  # re-analysed: replaced
    from server.alarms.tables import AlarmPointStatus

    with migrated_db.read() as s:
        history = s.get(AlarmPointStatus, plant.point_id).history
    times = [h[0] for h in history]
    assert times == sorted(times) and len(times) == 5
    assert history[0] == [late.timestamp(), 4.5]
    levels = {a["metric"]: a["level"] for a in service.list_alarms(migrated_db, view="all")}
    assert levels["half_order_velocity"] == "alert"


def test_a_calm_record_costs_one_read_and_one_write(feeder, plant, migrated_db, hw_settings):
    # The worker's hot path: a record that changes no level reads the point's data in one SELECT and
    # writes only the status row (one UPDATE); a level change also writes its event and state rows.
    import json

    from sqlalchemy import event

    from server.alarms import evaluate_result
    from server.storage.tables import Record, Result

    for _ in range(6):  # enough readings for the trend: no rule's inactive reason changes any more
        feeder.feed(plant.point_id, make_result(half_v=0.2))
    seen: list[str] = []

    def count(conn, cursor, statement, *args):
        seen.append(statement.split(None, 1)[0].upper())

    def evaluate(data, at):
        with migrated_db.unit_of_work() as s:
            rec = Record(point_id=plant.point_id, measured_at=at, fs_hz=2560.0, n_samples=25600, units="m/s2",
                         origin="api", uploader="test", checksum=f"{at.timestamp():064.0f}")
            s.add(rec)
            s.flush()
            res = Result(record_id=rec.id, point_id=plant.point_id, measured_ts=at.timestamp(),
                         analysis_version="test", data=json.dumps(data), spectrum=b"")
            s.add(res)
            s.flush()
            seen.clear()
            event.listen(migrated_db.write_engine, "before_cursor_execute", count)
            try:
                events = evaluate_result(s, rec, res, settings=hw_settings, now=at)
                s.flush()
            finally:
                event.remove(migrated_db.write_engine, "before_cursor_execute", count)
            return events, list(seen)

    events, statements = evaluate(make_result(half_v=0.2), T0 + dt.timedelta(days=3))
    # PostgreSQL first locks the point row in a statement of its own, so the read after it sees what a
    # concurrent worker committed meanwhile (server/alarms/pointstate.py)
    lock = ["SELECT"] if migrated_db.write_engine.dialect.name == "postgresql" else []
    assert events == [] and statements == [*lock, "SELECT", "UPDATE"]
    evaluate(make_result(half_v=2.0), T0 + dt.timedelta(days=4))
    events, statements = evaluate(make_result(half_v=2.0), T0 + dt.timedelta(days=5))  # 2 of 3: alert
    assert [(e.metric, e.to_level) for e in events if e.metric == "half_order_velocity"] == [
        ("half_order_velocity", "alert")]
    assert statements[0] == "SELECT" and "INSERT" in statements and statements.count("UPDATE") >= 2
