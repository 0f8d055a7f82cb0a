"""Stored names no email header can carry do not stall the outbox (real aiosmtpd on 127.0.0.1).

Old data may predate the name rule (server/names.py), so the hostile values are written straight
into the database with SQL, bypassing the API. Header injection through CR/LF in a header value is
the attack RFC 5322 section 2.2 rules out (header fields are single lines; folding is the only line
break allowed); the check is that the delivered Subject is one line and no extra header or
recipient appeared.
"""

from __future__ import annotations

import datetime as dt

from alarms.helpers import make_result
from sqlalchemy import select, text

from server.alarms import service
from server.alarms.mailer import BUILD_ATTEMPTS, run_mailer_once
from server.alarms.tables import OutboxMessage
from server.storage.tables import utcnow

ONSET = [0.2, 0.3, 1.5, 1.6]  # the 4th reading raises the half-order alert (as in test_mail.py)
ORDINARY = [0.6, 0.9, 4.5, 4.8]  # the compressor's 4th reading is past its half-order danger level
HOSTILE_ASSET = "CW pump 1\r\nBcc: intruder@evil.example\r\nX-Injected: yes"
HOSTILE_POINT = "P1-DE-H\u202eH-ED\x85"  # PostgreSQL text cannot hold NUL at all
HOSTILE_RCPT = "ops@example.test\r\nBcc: intruder@evil.example"


def _passes(db, settings, n: int) -> list[str]:
    """``n`` mailer passes as the sender's loop runs them (an exception is logged, the loop goes on),
    each on a clock far enough ahead that every lease and backoff of the previous pass has run out."""
    errors = []
    t = utcnow()
    for _ in range(n):
        t += dt.timedelta(seconds=30)
        try:
            run_mailer_once(db, settings, now=t)
        except Exception as exc:  # noqa: BLE001 - what run_mailer_forever does with a failing pass
            errors.append(repr(exc))
    return errors


def test_hostile_names_neither_inject_headers_nor_hold_back_other_alarms(feeder, plant, migrated_db, smtp,
                                                                        mail_settings):
    db = migrated_db
    service.create_subscription(db, {"email": "planner@example.test", "scope": "site",
                                     "scope_id": plant.site_id}, actor="admin1")
    bad = service.create_subscription(db, {"email": "ops@example.test", "scope": "site",
                                           "scope_id": plant.site_id}, actor="admin1")
    with db.unit_of_work() as s:  # old data: written before names and addresses were checked
        s.execute(text("UPDATE assets SET name = :n WHERE id = :i"), {"n": HOSTILE_ASSET,
                                                                      "i": plant.asset_ids["pump"]})
        s.execute(text("UPDATE points SET name = :n WHERE id = :i"),
                  {"n": HOSTILE_POINT, "i": plant.point_id})
        s.execute(text("UPDATE alarm_subscriptions SET email = :e WHERE id = :i"),
                  {"e": HOSTILE_RCPT, "i": bad["id"]})
    for v in ONSET:  # the hostile machine's alarm first ...
        feeder.feed(plant.point_id, make_result(half_v=v))
    for v in ORDINARY:  # ... then an ordinary machine's alarm queued behind it
        feeder.feed(plant.point_ids["C2-CYL-A"], make_result(half_v=v, f1x=25.0))
    with db.read() as s:
        rows = list(s.scalars(select(OutboxMessage).order_by(OutboxMessage.id)))
    assert [r.recipient for r in rows].count("planner@example.test") == 2, "both alarms were queued"
    assert len(rows) == 4

    errors = _passes(db, mail_settings, BUILD_ATTEMPTS + 3)
    assert errors == [], errors  # no pass broke off

    # the two alarms reached the planner, each exactly once, and nothing reached anyone else
    got = smtp.messages
    assert [m["to"] for m in got] == [["planner@example.test"], ["planner@example.test"]]
    assert len({m["msg"]["Message-ID"] for m in got}) == 2
    hostile, ordinary = sorted(got, key=lambda m: "CW pump" not in m["msg"]["Subject"])
    subject = hostile["msg"]["Subject"]
    assert "\r" not in subject and "\n" not in subject and "\u202e" not in subject and "\x85" not in subject
    assert subject.startswith("[halfwatch] ALERT: CW pump 1 Bcc: intruder@evil.example X-Injected: yes / ")
    assert hostile["msg"]["Bcc"] is None and hostile["msg"]["X-Injected"] is None
    assert "Air compressor 2 / C2-CYL-A" in ordinary["msg"]["Subject"]

    with db.read() as s:
        rows = {r.id: r for r in s.scalars(select(OutboxMessage))}
    sent = [r for r in rows.values() if r.status == "sent"]
    failed = [r for r in rows.values() if r.status == "failed"]
    assert len(sent) == 2 and all(r.recipient == "planner@example.test" for r in sent)
    assert len(failed) == 2 and all(r.recipient.lower() == HOSTILE_RCPT.lower() for r in failed)
    for r in failed:  # failed after the stated number of tries, with the reason kept
        assert r.attempts == BUILD_ATTEMPTS
        assert "message could not be built" in r.last_error and "not one plain address" in r.last_error
        assert "\n" not in r.last_error
    assert all(r.status in ("sent", "failed") for r in rows.values())  # nothing left claimed or pending
