"""A simulated onset: ingest -> real worker -> alarms -> outbox -> real SMTP -> acknowledgement by API."""

from __future__ import annotations

import datetime as dt
import math

from sqlalchemy import select
from support.signals import tone_record

from server import worker
from server.alarms import service
from server.alarms.mailer import run_mailer_once
from server.alarms.tables import AlarmEvent, AlarmIncident, OutboxMessage
from server.services.ingest import ingest_record

T0 = dt.datetime(2026, 11, 2, 6, 0, tzinfo=dt.UTC)
HALF_HZ = 24.75 / 2


def accel_peak_for(velocity_rms_mm_s: float) -> float:
    """Acceleration peak (m/s2) of a 0.5X sine with this velocity r.m.s.: A = V sqrt(2) 2 pi f (sine law)."""
    return velocity_rms_mm_s * 1e-3 * math.sqrt(2) * 2 * math.pi * HALF_HZ


# Half-order velocity of each record (mm/s r.m.s.); defaults alert at 1.4, danger at 2.8, 2 of 3.
ONSET_MM_S = [0.2, 0.3, 1.9, 2.0, 2.2, 3.6, 3.8, 4.0]


def test_simulated_onset_alerts_emails_survives_outage_and_is_acknowledged(
        migrated_db, hw_settings, plant, smtp, mail_settings, users, rng):
    db = migrated_db
    service.create_subscription(db, {"email": "planner@example.test", "scope": "asset",
                                     "scope_id": plant.asset_ids["pump"]}, actor="admin1")
    sent_per_record, stopped_at = {}, None
    for i, v in enumerate(ONSET_MM_S, start=1):
        x = tone_record(rng, amp_1x=0.4, amp_half=accel_peak_for(v), n=16384)
        ingest_record(db, point_id=plant.point_id, samples=x, fs_hz=2560.0, units="m/s2",
                      measured_at=T0 + dt.timedelta(hours=6 * i), origin="api", uploader="test")
        assert worker.run_once(db, hw_settings, "w1")
        with db.read() as s:
            first_danger = stopped_at is None and s.scalar(select(AlarmEvent.id).where(
                AlarmEvent.to_level == "danger").limit(1)) is not None
        if first_danger:
            smtp.stop()  # the SMTP server is down when the machine's incident reaches danger
            stopped_at = i
        sent_per_record[i] = run_mailer_once(db, mail_settings)
    with db.read() as s:
        half = [(e.record_id, e.from_level, e.to_level) for e in s.scalars(
            select(AlarmEvent).where(AlarmEvent.metric == "half_order_velocity").order_by(AlarmEvent.id))]
        pending = s.scalars(select(OutboxMessage).where(OutboxMessage.status == "pending")).all()
    assert [(lv_from, lv_to) for _r, lv_from, lv_to in half] == [("normal", "alert"), ("alert", "danger")]
    alert_record, danger_record = half[0][0], half[1][0]
    assert (alert_record, danger_record) == (4, 7)  # the 4th and the 7th record (ids follow the order)
    assert stopped_at is not None and sent_per_record[stopped_at] == 0 and len(pending) == 1  # waiting
    smtp.start()
    later = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=5)  # past the backoff
    run_mailer_once(db, mail_settings, now=later)
    # One email per escalation of the machine's incident (alert, then danger), none twice, none for the
    # rules that joined it at a level already announced.
    subjects = [str(m["msg"]["Subject"]).strip() for m in smtp.messages]
    ids = {m["msg"]["Message-ID"] for m in smtp.messages}
    words = [s.split(":")[0].removeprefix("[halfwatch] ") for s in subjects]
    assert words in (["ALERT", "DANGER"], ["DANGER"]) and len(ids) == len(subjects)  # each level once
    with db.read() as s:
        [incident] = s.scalars(select(AlarmIncident)).all()
    assert incident.emails == len(subjects) and incident.announced_level == "danger"
    assert incident.cleared_at is None
    bodies = [m["msg"].get_body(preferencelist=("plain",)).get_content() for m in smtp.messages]
    danger_mail = bodies[-1]
    assert "half-order component at 12.4 Hz (0.50X)" in danger_mail  # 24.75 Hz / 2
    assert "Rules of this machine now:" in danger_mail and "DANGER " in danger_mail
    assert "lockout/tagout" in danger_mail  # the cautions stay on every email
    # The engineer acknowledges the danger alarm through the API.
    engineer = users.login("engineer")
    open_ = engineer.get("/api/v1/alarms", params={"asset_id": plant.asset_ids["pump"], "level": "danger"})
    [alarm] = [a for a in open_.json()["alarms"] if a["metric"] == "half_order_velocity"]
    r = engineer.post(f"/api/v1/alarms/{alarm['id']}/acknowledge", json={"comment": "stand-by pump started"})
    assert r.status_code == 200
    active = engineer.get("/api/v1/alarms", params={"asset_id": plant.asset_ids["pump"]}).json()["alarms"]
    assert alarm["id"] not in [a["id"] for a in active]


def test_the_worker_loop_sends_the_emails_itself(migrated_db, plant, smtp, mail_settings, rng):
    import threading
    import time

    db = migrated_db
    settings = mail_settings.model_copy(update={"mail_poll_s": 0.1, "worker_alarm_background": True})
    service.create_subscription(db, {"email": "planner@example.test", "scope": "site",
                                     "scope_id": plant.site_id}, actor="admin1")
    for i, v in enumerate(ONSET_MM_S[:4], start=1):
        x = tone_record(rng, amp_1x=0.4, amp_half=accel_peak_for(v), n=16384)
        ingest_record(db, point_id=plant.point_id, samples=x, fs_hz=2560.0, units="m/s2",
                      measured_at=T0 + dt.timedelta(hours=6 * i), origin="api", uploader="test")
    stop = threading.Event()
    thread = threading.Thread(target=worker.run_forever, args=(db, settings), kwargs={"stop": stop})
    thread.start()
    try:
        deadline = time.monotonic() + 60
        while not smtp.messages and time.monotonic() < deadline:
            time.sleep(0.05)
    finally:
        stop.set()
        thread.join(30)
    assert not thread.is_alive()
    assert any("half-order velocity r.m.s.: normal -> ALERT" in m["msg"].get_body(preferencelist=("plain",))
               .get_content() for m in smtp.messages)
