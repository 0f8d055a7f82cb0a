"""Ops-area fixtures: a migrated database on SQLite and PostgreSQL, and real child processes.

- ``backend``: (Database, Settings, Plant) on a migrated database, parametrised over SQLite and, when
  HALFWATCH_TEST_POSTGRES_URL is set, PostgreSQL (a fresh schema per test).
- ``procs``: an ``ops.helpers.Procs`` (server and worker child processes), killed by pid at the end.
"""

from __future__ import annotations

import pytest
from ops.helpers import Procs
from support.fixtures import settings_for
from support.plant import make_plant


@pytest.fixture(params=["sqlite", "postgresql"])
def backend(request, tmp_path):
    from server.migrations import upgrade
    from server.storage import Database

    overrides = dict(retry_backoff_s=0.0, worker_poll_s=0.05)
    if request.param == "postgresql":
        settings = request.getfixturevalue("pg_settings").model_copy(update=overrides)
    else:
        settings = settings_for(tmp_path, **overrides)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    yield db, settings, make_plant(db)
    db.dispose()


@pytest.fixture
def procs(tmp_path):
    ps = Procs(tmp_path)
    yield ps
    ps.close()
