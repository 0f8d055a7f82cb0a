"""Fixtures shared by every test area (registered by tests/conftest.py).

- ``hw_settings``: Settings with the data dir in tmp_path, cheap Argon2, a fixed secret.
- ``migrated_db``: the Database after ``db upgrade`` (real SQLite file; PostgreSQL with ``pg_settings``).
- ``app`` / ``client``: create_app(hw_settings) and a TestClient (lifespan running).
- ``plant``: the seeded plant (support.plant.Plant with site/area/asset/point/route ids).
- ``users``: one user per role; ``login(role)`` returns a logged-in TestClient with the CSRF header set.
- ``api_key``: a technician key limited to the plant's site (``plant_key_headers`` for requests).
- ``live_server``: the same app served by a real uvicorn on 127.0.0.1; yields the base URL.
- ``pg_settings``: Settings on a fresh PostgreSQL schema if HALFWATCH_TEST_POSTGRES_URL is set, else skip.
- ``db_backend``: "sqlite" (default) or "postgresql". tests/conftest.py parametrises it over both for the
  server, alarms and ops areas when HALFWATCH_TEST_POSTGRES_URL is set; on "postgresql" every
  ``settings_for(tmp_path)`` of that test (so ``hw_settings`` and the area fixtures) points at one
  fresh schema.
"""

from __future__ import annotations

import os
import uuid
from contextlib import contextmanager

import pytest

from support.plant import make_plant
from support.servers import serve_in_thread

PASSWORD = "correct horse 42"
ROLES = ("viewer", "technician", "engineer", "admin")
PG_ENV = "HALFWATCH_TEST_POSTGRES_URL"

_BACKEND_URLS: dict[str, str] = {}  # str(tmp_path) -> database URL of that test (db_backend fixture)


def settings_for(tmp_path, **overrides):
    from server.settings import Settings

    base = dict(data_dir=tmp_path / "data", secret_key="test-secret", argon2_time_cost=1,
                argon2_memory_cost_kib=1024, argon2_parallelism=1, worker_poll_s=0.05, lease_s=30.0)
    if str(tmp_path) in _BACKEND_URLS:
        base["database_url"] = _BACKEND_URLS[str(tmp_path)]
    base.update(overrides)
    return Settings(**base)


@contextmanager
def pg_schema():
    """A fresh schema on the test PostgreSQL; yields a database URL whose search_path is that schema."""
    url = os.environ.get(PG_ENV)
    if not url:
        pytest.skip(f"{PG_ENV} is not set")
    from sqlalchemy import create_engine, text

    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = create_engine(url)
    with admin.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    sep = "&" if "?" in url else "?"
    try:
        yield f"{url}{sep}options=-csearch_path%3D{schema}"
    finally:
        with admin.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


@pytest.fixture
def db_backend(request, tmp_path):
    backend = getattr(request, "param", "sqlite")
    if backend != "postgresql":
        yield backend
        return
    with pg_schema() as url:
        _BACKEND_URLS[str(tmp_path)] = url
        try:
            yield backend
        finally:
            _BACKEND_URLS.pop(str(tmp_path), None)


@pytest.fixture
def hw_settings(tmp_path, db_backend):
    return settings_for(tmp_path)


@pytest.fixture(scope="session")
def migrated_template(tmp_path_factory):
    """A SQLite file migrated once per session; each test gets its own copy (fast and isolated)."""
    from server.migrations import upgrade

    path = tmp_path_factory.mktemp("template") / "halfwatch.db"
    upgrade(f"sqlite:///{path.as_posix()}")
    return path


def migrate(settings, template=None) -> None:
    """Bring the settings' database to the newest schema (copying the session template for SQLite)."""
    import shutil

    from server.migrations import upgrade

    if template is not None and settings.is_sqlite:
        target = settings.data_dir / "halfwatch.db"
        if settings.database_url == f"sqlite:///{target.as_posix()}" and not target.exists():
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(template, target)
            return
    upgrade(settings.database_url)


@pytest.fixture
def migrated_db(hw_settings, migrated_template):
    from server.storage import Database

    migrate(hw_settings, migrated_template)
    db = Database(hw_settings.database_url)
    yield db
    db.dispose()


@pytest.fixture
def app(hw_settings, migrated_db):
    from server.app import create_app

    return create_app(hw_settings)


@pytest.fixture
def client(app):
    from fastapi.testclient import TestClient

    with TestClient(app) as c:
        yield c


@pytest.fixture
def plant(migrated_db):
    return make_plant(migrated_db)


class Users:
    def __init__(self, app):
        self.app = app
        self.ids: dict[str, int] = {}
        self._clients = []

    def login(self, role: str):
        from fastapi.testclient import TestClient

        c = TestClient(self.app)
        c.__enter__()
        self._clients.append(c)
        r = c.post("/api/v1/session", json={"username": f"{role}1", "password": PASSWORD})
        assert r.status_code == 200, r.text
        c.headers["X-CSRF-Token"] = r.json()["csrf_token"]
        return c

    def close(self):
        for c in self._clients:
            c.__exit__(None, None, None)


@pytest.fixture
def users(app, hw_settings):
    from server.services.users import add_user

    u = Users(app)
    for role in ROLES:
        u.ids[role] = add_user(app.state.db, hw_settings, username=f"{role}1", password=PASSWORD, role=role,
                               email=f"{role}1@example.test", hashing=app.state.passwords)["id"]
    yield u
    u.close()


@pytest.fixture
def api_key(app, plant):
    from server.services.users import create_api_key

    key, _info = create_api_key(app.state.db, name="gateway A", role="technician", site=plant.site_id)
    return key


@pytest.fixture
def plant_key_headers(api_key):
    return {"Authorization": f"Bearer {api_key}"}


@pytest.fixture
def live_server(app):
    with serve_in_thread(app) as base:
        yield base


@pytest.fixture
def pg_settings(tmp_path):
    """Settings on a fresh schema of the test PostgreSQL (dropped afterwards)."""
    with pg_schema() as url:
        yield settings_for(tmp_path, database_url=url)
