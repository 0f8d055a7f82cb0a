"""Alert emails through a real aiosmtpd server on 127.0.0.1: content, outage, restarts, two senders."""

from __future__ import annotations

import datetime as dt
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
from alarms.helpers import make_result, run_senders
from sqlalchemy import select

from server.alarms import service
from server.alarms.mailer import run_mailer_once
from server.alarms.tables import OutboxMessage
from server.storage.tables import utcnow

ROOT = Path(__file__).resolve().parents[2]
ONSET = [0.2, 0.3, 1.5, 1.6, 1.9, 3.0, 3.2, 3.5]


def subscribe(db, plant, email="planner@example.test", **kw):
    body = {"email": email, "scope": "site", "scope_id": plant.site_id, **kw}
    return service.create_subscription(db, body, actor="admin1")


def statuses(db):
    with db.read() as s:
        return [r.status for r in s.scalars(select(OutboxMessage).order_by(OutboxMessage.id))]


def test_escalation_sends_exactly_one_email_with_the_finding(feeder, plant, migrated_db, smtp, mail_settings):
    subscribe(migrated_db, plant)
    for v in ONSET[:3]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    # The 4th reading raises the half-order alert (growth and zone C once: 1 of 3, no alarm yet).
    feeder.feed(plant.point_id, make_result(half_v=ONSET[3], growth=0.9, ci=(0.6, 1.2), overall=3.1,
                                            family={"1.5X": 0.4, "2.5X": None}))
    assert run_mailer_once(migrated_db, mail_settings) == 1
    assert run_mailer_once(migrated_db, mail_settings) == 0  # nothing twice
    [got] = smtp.messages
    msg = got["msg"]
    assert got["to"] == ["planner@example.test"]
    assert msg["Subject"].startswith("[halfwatch] ALERT: CW pump 1 / P1-DE-H")
    text = msg.get_body(preferencelist=("plain",)).get_content()
    html = msg.get_body(preferencelist=("html",)).get_content()
    assert "half-order component at 12.4 Hz (0.50X), 1.6 mm/s r.m.s., growing 0.9 /s" in text
    assert "zone C" in text
    assert "half-order 1.5 -> 1.6 mm/s r.m.s. (+7%)" in text  # change since the last reading
    assert "Forecast:" in text and "danger level" in text
    assert "not known (no operating-window fit" in text
    assert "check for rub" in text.lower() and "looseness" in text  # half-order with 1.5X (common practice)
    assert "Most likely cause:" in text and "Priority: routine; act by 2026-" in text  # docs/alarms.md
    assert f"https://cm.example.test/assets/{plant.asset_ids['pump']}" in text
    assert f'href="https://cm.example.test/assets/{plant.asset_ids["pump"]}"' in html
    assert "not a machine protection or trip system" in text and "lockout" in html
    assert statuses(migrated_db) == ["sent"]


def test_smtp_down_waits_in_outbox_then_goes_out(feeder, plant, migrated_db, smtp, mail_settings):
    subscribe(migrated_db, plant)
    smtp.stop()
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    # Every pass gets its clock (now=): the test proves the backoff schedule, not how fast it runs.
    t0 = utcnow()
    assert run_mailer_once(migrated_db, mail_settings, now=t0) == 0
    with migrated_db.read() as s:
        row = s.scalars(select(OutboxMessage)).one()
        assert row.status == "pending" and row.attempts == 1 and "connect" in row.last_error
        first_retry = row.next_attempt_at
        assert (first_retry - t0).total_seconds() == pytest.approx(0.2)  # mail_backoff_s
    just_before = first_retry - dt.timedelta(seconds=0.01)
    assert run_mailer_once(migrated_db, mail_settings, now=just_before) == 0  # backoff: not due, not tried
    with migrated_db.read() as s:
        assert s.scalars(select(OutboxMessage)).one().attempts == 1
    later = first_retry + dt.timedelta(seconds=0.01)
    assert run_mailer_once(migrated_db, mail_settings, now=later) == 0  # still down: attempt 2
    with migrated_db.read() as s:
        row = s.scalars(select(OutboxMessage)).one()
        assert row.attempts == 2
        assert (row.next_attempt_at - later).total_seconds() > 0.3  # doubled backoff (0.2 s x 2)
        due = row.next_attempt_at
    smtp.start()
    assert run_mailer_once(migrated_db, mail_settings, now=due + dt.timedelta(seconds=0.01)) == 1
    assert len(smtp.messages) == 1 and statuses(migrated_db) == ["sent"]


def _mailer_env(mail_settings) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    env.update(HALFWATCH_DATABASE_URL=mail_settings.database_url, HALFWATCH_SMTP_HOST="127.0.0.1",
               HALFWATCH_SMTP_PORT=str(mail_settings.smtp_port), HALFWATCH_MAIL_LEASE_S="1",
               HALFWATCH_MAIL_POLL_S="0.1", HALFWATCH_SMTP_TIMEOUT_S="30", PYTHONPATH=str(ROOT))
    return env


def test_sender_killed_mid_send_does_not_duplicate(feeder, plant, migrated_db, smtp, mail_settings):
    subscribe(migrated_db, plant)
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    smtp.handler.hold.set()  # the server stalls after MAIL FROM: the sender is mid-send
    proc = subprocess.Popen([sys.executable, "-m", "server", "mailer"], env=_mailer_env(mail_settings),
                            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        assert smtp.handler.rcpt_seen.wait(30), proc.stderr.read1().decode() if proc.poll() else "no RCPT"
        proc.kill()
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
    smtp.handler.hold.clear()
    assert statuses(migrated_db) == ["sending"] and smtp.messages == []
    time.sleep(1.1)  # the dead sender's lease (1 s) runs out
    assert run_mailer_once(migrated_db, mail_settings) == 1
    assert run_mailer_once(migrated_db, mail_settings) == 0
    assert len(smtp.messages) == 1 and statuses(migrated_db) == ["sent"]
    with migrated_db.read() as s:
        assert s.scalars(select(OutboxMessage)).one().attempts == 2


def test_two_senders_deliver_each_email_once(feeder, plant, migrated_db, smtp, mail_settings):
    for i in range(12):
        subscribe(migrated_db, plant, email=f"planner{i}@example.test")
    subscribe(migrated_db, plant, email="PLANNER0@example.test")  # same address twice: still one email
    for v in ONSET[:4]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    counts = run_senders(migrated_db, mail_settings, batch=3)
    assert sum(counts) == 12
    to = sorted(m["to"][0] for m in smtp.messages)
    assert to == sorted(f"planner{i}@example.test" for i in range(12))
    assert len({m["msg"]["Message-ID"] for m in smtp.messages}) == 12


def test_subscription_level_and_scope(feeder, plant, migrated_db, smtp, mail_settings):
    subscribe(migrated_db, plant, email="danger-only@example.test", min_level="danger")
    service.create_subscription(migrated_db, {"email": "fan@example.test", "scope": "asset",
                                              "scope_id": plant.asset_ids["fan"]}, actor="admin1")
    subscribe(migrated_db, plant, email="dq@example.test", include_data_quality=True)
    for v in ONSET[:7]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    feeder.feed(plant.point_id, make_result(half_v=9.0, flags=("clipping",), ok=False))
    run_mailer_once(migrated_db, mail_settings)
    by_to = {}
    for m in smtp.messages:
        by_to.setdefault(m["to"][0], []).append(m["msg"]["Subject"])
    assert "fan@example.test" not in by_to  # another asset
    assert all("DANGER" in s for s in by_to["danger-only@example.test"])
    assert any("data quality" in s for s in by_to["dq@example.test"])


def test_daily_digest_lists_open_alarms_by_severity(feeder, plant, migrated_db, smtp, mail_settings):
    service.create_subscription(migrated_db, {"email": "digest@example.test", "scope": "site",
                                              "scope_id": plant.site_id, "mode": "digest",
                                              "digest_time": "07:30", "timezone": "Europe/Berlin"},
                                actor="admin1")
    for v in ONSET[:7]:
        feeder.feed(plant.point_id, make_result(half_v=v))
    for v in (3.0, 3.0):  # overall into zone C on a second point
        feeder.feed(plant.point_ids["P1-NDE-V"], make_result(overall=v))
    assert smtp.messages == []  # a digest subscriber gets no immediate email
    at = dt.datetime(2026, 11, 10, 6, 0, tzinfo=dt.UTC)  # 07:00 in Berlin (CET, UTC+1): not yet
    assert run_mailer_once(migrated_db, mail_settings, now=at) == 0
    at = dt.datetime(2026, 11, 10, 6, 31, tzinfo=dt.UTC)  # 07:31 in Berlin
    assert run_mailer_once(migrated_db, mail_settings, now=at) == 1
    assert run_mailer_once(migrated_db, mail_settings, now=at + dt.timedelta(hours=3)) == 0  # once a day
    [got] = smtp.messages
    text = got["msg"].get_body(preferencelist=("plain",)).get_content()
    assert got["msg"]["Subject"].startswith("[halfwatch] daily digest 2026-11-10 for site Riverside works")
    lines = [ln.strip() for ln in text.splitlines() if ln.strip().startswith(("DANGER", "ALERT"))]
    assert lines[0] == "DANGER: CW pump 1 (2 rule(s))"  # grouped by machine, the machine's worst level
    assert any(ln.startswith("DANGER") and "half-order velocity" in ln for ln in lines)
    assert any("P1-NDE-V" in ln and "overall velocity" in ln for ln in lines)
    assert [ln.split()[0] for ln in lines] == sorted((ln.split()[0] for ln in lines), key="DANGER ALERT".find)


def test_a_broken_sensor_emails_once_not_per_record(feeder, plant, migrated_db, smtp, mail_settings):
    subscribe(migrated_db, plant, email="dq@example.test", include_data_quality=True)
    for _ in range(4):
        feeder.feed(plant.point_id, make_result(half_v=2.0, flags=("flat-line",), ok=False))
    feeder.feed(plant.point_id, make_result(half_v=0.2))  # good again
    feeder.feed(plant.point_id, make_result(half_v=2.0, flags=("clipping",), ok=False))  # bad again
    run_mailer_once(migrated_db, mail_settings)
    subjects = [m["msg"]["Subject"] for m in smtp.messages]
    assert len(subjects) == 2 and all("data quality" in s for s in subjects)
