"""The same guarantees on PostgreSQL (runs when HALFWATCH_TEST_POSTGRES_URL is set)."""

from __future__ import annotations

import threading

import pytest
from alarms.helpers import Feeder, make_result
from sqlalchemy import text
from sqlalchemy.exc import DatabaseError
from support.plant import make_plant

from server.alarms import service
from server.alarms.mailer import claim, send_claimed
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
    with pytest.raises(DatabaseError, match="audit trail"):
        with db.unit_of_work() as s:
            s.execute(text("UPDATE alarm_events SET value = 0"))
    with pytest.raises(DatabaseError, match="audit trail"):
        with db.unit_of_work() as s:
            s.execute(text("DELETE FROM alarm_events"))
    counts, barrier = [], threading.Barrier(2)

    def sender(name):
        barrier.wait()
        total = 0
        while ids := claim(db, me=name, lease_s=30, batch=2):
            total += send_claimed(db, settings, ids, me=name)
        counts.append(total)

    threads = [threading.Thread(target=sender, args=(f"s{i}",)) for i in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sum(counts) == 6
    assert sorted(m["to"][0] for m in smtp.messages) == [f"p{i}@example.test" for i in range(6)]
