"""Alembic environment: the URL comes from the config (set by ``halfwatch db upgrade``) or
``HALFWATCH_DATABASE_URL``; the metadata from every table module (server.storage.all_tables)."""

from __future__ import annotations

from alembic import context
from sqlalchemy import create_engine, pool

from server.storage import all_tables

config = context.config
target_metadata = all_tables.metadata


def _url() -> str:
    url = config.get_main_option("sqlalchemy.url")
    if url:
        return url
    from server.settings import Settings

    return Settings().database_url


def run_migrations_offline() -> None:
    context.configure(url=_url(), target_metadata=target_metadata, literal_binds=True,
                      render_as_batch=_url().startswith("sqlite"))
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    url = _url()
    if url.startswith("sqlite"):
        from server.storage.engine import Database

        Database(url).dispose()  # creates the data directory
    engine = create_engine(url, poolclass=pool.NullPool)
    with engine.connect() as connection:
        context.configure(
            connection=connection,
            target_metadata=target_metadata,
            render_as_batch=connection.dialect.name == "sqlite",
        )
        with context.begin_transaction():
            context.run_migrations()
    engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
