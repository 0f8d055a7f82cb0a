"""Migrations run the same on SQLite and PostgreSQL: ``halfwatch db upgrade`` on an empty database, then no
drift between the tables in the code and the migrated schema (alembic's own compare_metadata, the check
``alembic check`` runs), and the append-only audit tables refuse changes on both backends.
"""

from __future__ import annotations

import subprocess
import sys

import pytest
from ops.helpers import ROOT, child_env
from sqlalchemy import create_engine, inspect, text
from sqlalchemy.exc import DatabaseError
from support.fixtures import settings_for


@pytest.fixture(params=["sqlite", "postgresql"])
def empty_settings(request, tmp_path):
    if request.param == "postgresql":
        return request.getfixturevalue("pg_settings")
    return settings_for(tmp_path)


def _drift(url: str) -> list:
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext

    from server.storage.all_tables import metadata

    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            ctx = MigrationContext.configure(conn, opts={"compare_type": True})
            return [d for d in compare_metadata(ctx, metadata)
                    if not _harmless(d) and not _other_backend(d, conn.dialect.name)]
    finally:
        engine.dispose()


def _other_backend(diff, dialect: str) -> bool:
    # an index the code declares for one backend only (Index(...).ddl_if(dialect=...)) is absent elsewhere
    from server.storage.all_tables import metadata

    if not (isinstance(diff, tuple) and diff[0] == "add_index"):
        return False
    declared = [i for t in metadata.tables.values() for i in t.indexes if i.name == diff[1].name]
    ddl_if = getattr(declared[0], "_ddl_if", None) if declared else None
    return ddl_if is not None and ddl_if.dialect is not None and ddl_if.dialect != dialect


def _harmless(diff) -> bool:
    # SQLite reports no server-side type details for JSON/booleans; PostgreSQL spells TIMESTAMP WITH TIME
    # ZONE for the UTC columns: type comparisons of these are dialect noise, not drift
    if isinstance(diff, list):
        return all(_harmless(d) for d in diff)
    return diff[0] == "modify_type"


def test_db_upgrade_on_an_empty_database_then_no_drift(empty_settings):
    done = subprocess.run([sys.executable, "-m", "server", "db", "upgrade"], env=child_env(empty_settings),
                          cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    from server.migrations import head_revisions

    assert f"database at revision {', '.join(sorted(head_revisions()))}" in done.stdout
    drift = _drift(empty_settings.database_url)
    assert drift == [], f"tables in the code and the migrations disagree: {drift}"
    again = subprocess.run([sys.executable, "-m", "server", "db", "upgrade"], env=child_env(empty_settings),
                           cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert again.returncode == 0, again.stderr  # running it twice is harmless


def test_the_same_tables_and_append_only_trails_on_both(empty_settings):
    from server.migrations import upgrade
    from server.storage.all_tables import metadata

    upgrade(empty_settings.database_url)
    engine = create_engine(empty_settings.database_url)
    try:
        assert set(metadata.tables) <= set(inspect(engine).get_table_names())
        with engine.begin() as conn:
            conn.execute(text("INSERT INTO config_changes (created_at, actor, action, target, details) "
                              "VALUES (:t, 'test', 'create', 'site', '{}')"),
                         {"t": "2026-03-02 08:00:00"})
        for statement in ("UPDATE config_changes SET actor = 'x'", "DELETE FROM config_changes"):
            with pytest.raises(DatabaseError), engine.begin() as conn:
                conn.execute(text(statement))
    finally:
        engine.dispose()
