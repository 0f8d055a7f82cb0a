"""The same guarantees on PostgreSQL (runs when HALFWATCH_TEST_POSTGRES_URL is set)."""

from __future__ import annotations

import pytest
from alarms.helpers import Feeder, assert_audit_trail_immutable, make_result, run_senders
from support.plant import make_plant

from server.alarms import service
from server.migrations import upgrade
from server.storage import Database

pytestmark = pytest.mark.postgres


@pytest.fixture
def pg(pg_settings):
    upgrade(pg_settings.database_url)
    db = Database(pg_settings.database_url)
    yield db, pg_settings, make_plant(db)
    db.dispose()


def test_escalation_audit_trail_and_two_senders_on_postgres(pg, smtp):
    db, settings, plant = pg
    settings = settings.model_copy(update={"smtp_host": "127.0.0.1", "smtp_port": smtp.port})
    for i in range(6):
        service.create_subscription(db, {"email": f"p{i}@example.test", "scope": "site",
                                         "scope_id": plant.site_id}, actor="admin1")
    feeder = Feeder(db, settings)
    got = []
    for v in (0.2, 0.3, 1.5, 1.6):
        got += [(e[3], e[4]) for e in feeder.feed(plant.point_id, make_result(half_v=v))
                if e[2] == "half_order_velocity"]
    assert got == [("normal", "alert")]
    assert_audit_trail_immutable(db)
    counts = run_senders(db, settings, batch=2)
    assert sum(counts) == 6
    assert sorted(m["to"][0] for m in smtp.messages) == [f"p{i}@example.test" for i in range(6)]


def test_two_points_of_one_machine_at_once_open_one_incident_on_postgres(pg):
    """Two workers store the raising record of two points of the same machine at the same moment: the
    machine's row is locked while its incident is updated, so one incident opens and one email is queued."""
    import datetime as dt
    import threading

    from sqlalchemy import select

    from server.alarms.tables import AlarmIncident, OutboxMessage

    db, settings, plant = pg
    service.create_subscription(db, {"email": "planner@example.test", "scope": "site",
                                     "scope_id": plant.site_id}, actor="admin1")
    t0 = dt.datetime(2026, 11, 2, 6, 0, tzinfo=dt.UTC)
    points = [plant.point_ids["P1-DE-H"], plant.point_ids["P1-NDE-V"]]
    feeders = [Feeder(db, settings), Feeder(db, settings)]
    feeders[1].n = 1000  # distinct record checksums
    for i, v in enumerate((0.2, 1.6)):
        for f, p in zip(feeders, points, strict=True):
            f.feed(p, make_result(half_v=v), at=t0 + dt.timedelta(hours=6 * i))
    barrier, errors = threading.Barrier(2), []

    def raise_alert(f, p):
        barrier.wait()
        try:
            f.feed(p, make_result(half_v=1.7), at=t0 + dt.timedelta(hours=12))
        except Exception as exc:  # a lost race would surface here (unique index on the open incident)
            errors.append(exc)

    threads = [threading.Thread(target=raise_alert, args=fp) for fp in zip(feeders, points, strict=True)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert errors == []
    with db.read() as s:
        incidents = s.scalars(select(AlarmIncident)).all()
        mails = s.scalars(select(OutboxMessage).where(OutboxMessage.kind == "incident")).all()
    assert len(incidents) == 1 and incidents[0].level == "alert"
    assert [m.recipient for m in mails] == ["planner@example.test"]
