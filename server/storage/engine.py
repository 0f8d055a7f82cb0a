"""The database handle: one engine (two on SQLite), write transactions and read sessions.

SQLite: WAL, ``synchronous=NORMAL``, ``busy_timeout``, foreign keys on; write transactions start with
``BEGIN IMMEDIATE`` so two writers never deadlock on a lock upgrade, reads use a plain deferred
``BEGIN`` on their own engine. PostgreSQL (``postgresql+psycopg://``) uses one pooled engine for both.
The calling code is the same for both backends.
"""

from __future__ import annotations

import logging
import sqlite3
import threading
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from pathlib import Path

from sqlalchemy import Connection, Engine, create_engine, event, inspect, text
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session, sessionmaker

log = logging.getLogger(__name__)

BUSY_TIMEOUT_MS = 10_000


class SchemaNotReady(RuntimeError):
    """The database has no schema or an old one; the message says what to run."""


def _sqlite_engine(url: str, *, immediate: bool, busy_timeout_ms: int) -> Engine:
    engine = create_engine(
        url,
        connect_args={"check_same_thread": False, "timeout": busy_timeout_ms / 1000},
        pool_size=8,
        max_overflow=8,
    )

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record):  # pragma: no cover - exercised by every test
        dbapi_conn.isolation_level = None  # we issue BEGIN ourselves
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.close()

    begin = "BEGIN IMMEDIATE" if immediate else "BEGIN"

    @event.listens_for(engine, "begin")
    def _on_begin(conn):  # straight to the driver: SQLAlchemy's execution path cost more than the BEGIN
        try:
            conn.connection.driver_connection.execute(begin)
        except sqlite3.Error as exc:  # the same exception SQLAlchemy raises for a failed statement
            raise DBAPIError.instance(begin, None, exc, sqlite3.Error) from exc

    return engine


class Database:
    """Owns the engine(s). ``unit_of_work()`` for writes, ``read()`` for queries."""

    def __init__(self, url: str, *, busy_timeout_ms: int = BUSY_TIMEOUT_MS):
        self.url = url
        self.is_sqlite = url.startswith("sqlite")
        if self.is_sqlite:
            path = url.split("///", 1)[-1]
            if path and path != ":memory:":
                Path(path).parent.mkdir(parents=True, exist_ok=True)
            self.write_engine = _sqlite_engine(url, immediate=True, busy_timeout_ms=busy_timeout_ms)
            self.read_engine = _sqlite_engine(url, immediate=False, busy_timeout_ms=busy_timeout_ms)
        else:
            self.write_engine = create_engine(url, pool_pre_ping=True, pool_size=8, max_overflow=8)
            self.read_engine = self.write_engine
        # SQLite has one writer; threads of this process queue here instead of in SQLite's busy handler,
        # whose sleeps (up to 100 ms) would otherwise dominate latency under concurrent writes
        self._write_lock = threading.RLock() if self.is_sqlite else nullcontext()
        self._writer = sessionmaker(self.write_engine, expire_on_commit=False)
        self._reader = sessionmaker(self.read_engine, expire_on_commit=False)
        from server.storage.waveforms import DEFAULT

        self.waveforms = DEFAULT  # the database backend; from_settings() attaches the configured store
        self.group_commit_max = 32  # ingest requests per transaction at most (server/storage/group_commit.py)

    @classmethod
    def from_settings(cls, settings) -> Database:
        """The database of ``settings`` with its waveform store (server/storage/waveforms.py)."""
        from server.storage import waveforms

        db = cls(settings.database_url, busy_timeout_ms=settings.db_busy_timeout_ms)
        waveforms.attach(db, waveforms.from_settings(settings))
        db.group_commit_max = settings.ingest_group_commit
        return db

    @property
    def dialect(self) -> str:
        return self.write_engine.dialect.name

    @contextmanager
    def unit_of_work(self) -> Iterator[Session]:
        """One write transaction: committed when the block ends, rolled back on any exception."""
        with self._write_lock, self._writer() as session, session.begin():
            yield session

    @contextmanager
    def write(self) -> Iterator[Connection]:
        """A Core write transaction (no ORM session): for hot paths such as ingestion and job claims."""
        with self._write_lock, self.write_engine.begin() as conn:
            yield conn

    @contextmanager
    def read(self) -> Iterator[Session]:
        """A read session (never commits anything)."""
        with self._reader() as session:  # close() ends the transaction; loaded objects stay usable
            yield session

    def check_schema(self) -> None:
        """Refuse to run on a database that is not at the newest migration."""
        from server.migrations import head_revisions

        heads = head_revisions()
        with self.read_engine.connect() as conn:
            if not inspect(conn).has_table("alembic_version"):
                raise SchemaNotReady(
                    f"database {self.safe_url} has no halfwatch schema; run `halfwatch db upgrade` first"
                )
            current = {row[0] for row in conn.execute(text("SELECT version_num FROM alembic_version"))}
        if current != heads:
            raise SchemaNotReady(
                f"database {self.safe_url} is at revision {sorted(current) or 'none'}, the code needs "
                f"{sorted(heads)}; run `halfwatch db upgrade`"
            )

    @property
    def safe_url(self) -> str:
        from sqlalchemy.engine import make_url

        return make_url(self.url).render_as_string(hide_password=True)

    def dispose(self) -> None:
        self.write_engine.dispose()
        if self.read_engine is not self.write_engine:
            self.read_engine.dispose()
