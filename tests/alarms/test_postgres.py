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
