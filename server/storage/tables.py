"""The core tables: asset registry, routes, records, jobs, results, users, sessions, API keys.

Every table shares :data:`Base`. Other parts add tables on the same ``Base`` in their own modules
(listed in :mod:`server.storage.all_tables`) with their own Alembic revisions after ``0001``.
Times are stored as UTC and come back timezone-aware (:class:`UTCDateTime`).
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import (
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
    text,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

NAMING = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class UTCDateTime(TypeDecorator):
    """A timezone-aware UTC timestamp on every backend (SQLite keeps no zone of its own)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        value = value.astimezone(dt.UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=dt.UTC) if value.tzinfo is None else value.astimezone(dt.UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


MACHINE_KINDS = ("pump", "fan", "compressor", "gearbox", "reciprocating_compressor", "engine", "other")
FORCING_KINDS = ("shaft", "stroke", "mesh", "other")
FOUNDATIONS = ("rigid", "flexible")
UNITS = ("g", "m/s2", "mm/s2")  # acceleration, as the analysis core accepts them
ORIGINS = ("api", "upload", "route", "mqtt", "other")
ROLES = ("viewer", "technician", "engineer", "admin")
JOB_STATES = ("queued", "running", "done", "failed")


class Site(Base):
    __tablename__ = "sites"
    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(120), unique=True)
    description: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    areas: Mapped[list[Area]] = relationship(back_populates="site", order_by="Area.name")


class Area(Base):
    __tablename__ = "areas"
    __table_args__ = (UniqueConstraint("site_id", "name"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    site_id: Mapped[int] = mapped_column(ForeignKey("sites.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(120))
    description: Mapped[str] = mapped_column(Text, default="")
    site: Mapped[Site] = relationship(back_populates="areas")
    assets: Mapped[list[Asset]] = relationship(back_populates="area", order_by="Asset.name")


class Asset(Base):
    __tablename__ = "assets"
    __table_args__ = (UniqueConstraint("area_id", "name"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    area_id: Mapped[int] = mapped_column(ForeignKey("areas.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(120))
    kind: Mapped[str] = mapped_column(String(32), default="other")
    rated_power_kw: Mapped[float | None] = mapped_column(Float)
    machine_group: Mapped[int] = mapped_column(Integer, default=2)  # ISO 20816-3 group 1 or 2
    foundation: Mapped[str] = mapped_column(String(16), default="rigid")
    nominal_speed_hz: Mapped[float] = mapped_column(Float)
    # forcing frequency = shaft speed x forcing_multiplier (1 for shaft, teeth for mesh, strokes/rev)
    forcing_kind: Mapped[str] = mapped_column(String(16), default="shaft")
    forcing_multiplier: Mapped[float] = mapped_column(Float, default=1.0)
    description: Mapped[str] = mapped_column(Text, default="")
    area: Mapped[Area] = relationship(back_populates="assets")
    points: Mapped[list[Point]] = relationship(back_populates="asset", order_by="Point.name")


class Point(Base):
    __tablename__ = "points"
    __table_args__ = (UniqueConstraint("asset_id", "name"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    asset_id: Mapped[int] = mapped_column(ForeignKey("assets.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(120))
    location: Mapped[str] = mapped_column(String(200), default="")
    direction: Mapped[str] = mapped_column(String(16), default="radial")
    sensitivity_mv_per_unit: Mapped[float | None] = mapped_column(Float)
    units: Mapped[str] = mapped_column(String(8), default="m/s2")
    expected_fs_hz: Mapped[float | None] = mapped_column(Float)
    asset: Mapped[Asset] = relationship(back_populates="points")


class Route(Base):
    __tablename__ = "routes"
    __table_args__ = (UniqueConstraint("site_id", "name"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    site_id: Mapped[int] = mapped_column(ForeignKey("sites.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(120))
    description: Mapped[str] = mapped_column(Text, default="")
    stops: Mapped[list[RouteStop]] = relationship(
        back_populates="route", order_by="RouteStop.position", cascade="all, delete-orphan"
    )


class RouteStop(Base):
    __tablename__ = "route_stops"
    __table_args__ = (UniqueConstraint("route_id", "position"), UniqueConstraint("route_id", "point_id"))
    id: Mapped[int] = mapped_column(primary_key=True)
    route_id: Mapped[int] = mapped_column(ForeignKey("routes.id", ondelete="CASCADE"))
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"), index=True)
    position: Mapped[int] = mapped_column(Integer)
    due_interval_h: Mapped[float] = mapped_column(Float, default=720.0)
    route: Mapped[Route] = relationship(back_populates="stops")
    point: Mapped[Point] = relationship()


class Record(Base):
    __tablename__ = "records"
    __table_args__ = (
        UniqueConstraint("point_id", "client_ref"),
        Index("ix_records_point_measured", "point_id", "measured_at"),
    )
    id: Mapped[int] = mapped_column(primary_key=True)
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="RESTRICT"))
    measured_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    received_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    fs_hz: Mapped[float] = mapped_column(Float)
    n_samples: Mapped[int] = mapped_column(Integer)
    units: Mapped[str] = mapped_column(String(8))
    speed_hz: Mapped[float | None] = mapped_column(Float)
    speed_source: Mapped[str | None] = mapped_column(String(32))
    origin: Mapped[str] = mapped_column(String(16))
    uploader: Mapped[str] = mapped_column(String(120))
    client_ref: Mapped[str | None] = mapped_column(String(200))
    checksum: Mapped[str] = mapped_column(String(64))  # sha256 of the stored float32 little-endian samples
    point: Mapped[Point] = relationship()


class Waveform(Base):
    """The samples of one record (kept apart so record queries never drag the blob along)."""

    __tablename__ = "waveforms"
    __table_args__ = (Index("ix_waveforms_digest", "digest", sqlite_where=text("digest IS NOT NULL"),
                            postgresql_where=text("digest IS NOT NULL")),)
    record_id: Mapped[int] = mapped_column(ForeignKey("records.id", ondelete="CASCADE"), primary_key=True)
    codec: Mapped[str] = mapped_column(String(32))
    data: Mapped[bytes] = mapped_column(LargeBinary)
    source_name: Mapped[str | None] = mapped_column(String(255))
    source_bytes: Mapped[bytes | None] = mapped_column(LargeBinary)  # uploaded file, compressed
    # where the samples are (server/storage/waveforms.py): "database" (in ``data``) or "files" (``data`` is
    # empty; the file is named by ``digest``, the SHA-256 of the raw float32 samples)
    store: Mapped[str] = mapped_column(String(16), default="database", server_default="database")
    digest: Mapped[str | None] = mapped_column(String(64))


class Job(Base):
    __tablename__ = "jobs"
    __table_args__ = (Index("ix_jobs_state_id", "state", "id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    record_id: Mapped[int] = mapped_column(ForeignKey("records.id", ondelete="CASCADE"), index=True)
    state: Mapped[str] = mapped_column(String(16), default="queued")
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    not_before: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    lease_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    worker_id: Mapped[str | None] = mapped_column(String(120))
    error: Mapped[str | None] = mapped_column(Text)
    reason: Mapped[str] = mapped_column(String(32), default="ingest")
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    finished_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)


class Result(Base):
    """One analysis of one record by one analysis version; the newest is ``current``.

    The main metrics are real columns (with ``point_id`` and ``measured_ts``, epoch seconds) so a
    trend query can bucket them in SQL; each names its measure (peak / r.m.s., acceleration in record
    units or velocity in mm/s; see server/storage/result_columns.py). The full output is in ``data``
    (JSON text, ``RecordAnalysis.to_dict()``; read it back with ``RecordAnalysis.from_dict``).
    """

    __tablename__ = "results"
    __table_args__ = (
        Index("ix_results_point_ts", "point_id", "current", "measured_ts"),
        # PostgreSQL: the chart columns of current results beside (point, time), so a trend is an index-only
        # scan (migration 0007; docs/scale.md). SQLite keeps the index above.
        Index("ix_results_trend_pg", "point_id", "measured_ts", postgresql_where=text("current"),
              postgresql_include=["record_id", "sub_detected", "sub_velocity_rms_mm_s",
                                  "one_x_velocity_rms_mm_s", "sub_accel_peak", "one_x_accel_peak",
                                  "overall_velocity_rms_mm_s", "growth_rate_per_s", "forcing_hz",
                                  "precursor_rate_per_s"]).ddl_if(dialect="postgresql"),
    )
    id: Mapped[int] = mapped_column(primary_key=True)
    record_id: Mapped[int] = mapped_column(ForeignKey("records.id", ondelete="CASCADE"), index=True)
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"))
    measured_ts: Mapped[float] = mapped_column(Float)
    analysis_version: Mapped[str] = mapped_column(String(40))
    current: Mapped[bool] = mapped_column(Boolean, default=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    data: Mapped[str] = mapped_column(Text)
    spectrum: Mapped[bytes] = mapped_column(LargeBinary)  # compressed JSON of the decimated chart spectrum
    forcing_hz: Mapped[float | None] = mapped_column(Float)
    sub_detected: Mapped[bool] = mapped_column(Boolean, default=False)
    sub_class: Mapped[str | None] = mapped_column(String(32))
    sub_frequency_hz: Mapped[float | None] = mapped_column(Float)
    sub_accel_peak: Mapped[float | None] = mapped_column(Float)  # record units, sine peak
    sub_velocity_peak_mm_s: Mapped[float | None] = mapped_column(Float)
    sub_velocity_rms_mm_s: Mapped[float | None] = mapped_column(Float)  # what charts and rules compare
    sub_snr_db: Mapped[float | None] = mapped_column(Float)
    growth_rate_per_s: Mapped[float | None] = mapped_column(Float)
    overall_velocity_rms_mm_s: Mapped[float | None] = mapped_column(Float)
    zone: Mapped[str | None] = mapped_column(String(4))
    quality_ok: Mapped[bool] = mapped_column(Boolean, default=True)
    one_x_accel_peak: Mapped[float | None] = mapped_column(Float)  # record units, sine peak
    one_x_velocity_rms_mm_s: Mapped[float | None] = mapped_column(Float)
    precursor_rate_per_s: Mapped[float | None] = mapped_column(Float)  # 0.5X precursor γ−


class User(Base):
    __tablename__ = "users"
    id: Mapped[int] = mapped_column(primary_key=True)
    username: Mapped[str] = mapped_column(String(80), unique=True)
    email: Mapped[str] = mapped_column(String(200), default="")
    password_hash: Mapped[str] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(16))
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # a user limited to one site (migration 0011); None = every site
    site_id: Mapped[int | None] = mapped_column(ForeignKey("sites.id", ondelete="CASCADE"))


class UserSession(Base):
    __tablename__ = "user_sessions"
    id: Mapped[int] = mapped_column(primary_key=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    csrf_token: Mapped[str] = mapped_column(String(64))
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    expires_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    user: Mapped[User] = relationship()


class ApiKey(Base):
    __tablename__ = "api_keys"
    id: Mapped[int] = mapped_column(primary_key=True)
    prefix: Mapped[str] = mapped_column(String(16), unique=True)  # public part, shown in lists
    key_hash: Mapped[str] = mapped_column(String(64))
    name: Mapped[str] = mapped_column(String(120))
    role: Mapped[str] = mapped_column(String(16), default="technician")
    site_id: Mapped[int | None] = mapped_column(ForeignKey("sites.id", ondelete="CASCADE"))
    created_by: Mapped[str] = mapped_column(String(80), default="")
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_used_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
