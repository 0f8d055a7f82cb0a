"""Alembic migrations. Revision ids: ``0001`` initial schema, ``0002`` alarms, ``0003``+ later.

``upgrade(url)`` is what ``halfwatch db upgrade`` runs; ``head_revisions()`` is what the app
checks the database against at start.
"""

from __future__ import annotations

from pathlib import Path

HERE = Path(__file__).resolve().parent


def alembic_config(url: str | None = None):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(HERE))
    cfg.set_main_option("path_separator", "os")
    if url:
        cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


def head_revisions() -> set[str]:
    from alembic.script import ScriptDirectory

    return set(ScriptDirectory.from_config(alembic_config()).get_heads())


def upgrade(url: str, revision: str = "head") -> None:
    from alembic import command

    command.upgrade(alembic_config(url), revision)


def current_revisions(url: str) -> set[str]:
    from sqlalchemy import create_engine, inspect, text

    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            if not inspect(conn).has_table("alembic_version"):
                return set()
            return {r[0] for r in conn.execute(text("SELECT version_num FROM alembic_version"))}
    finally:
        engine.dispose()
