"""Alarm tables on the shared ``Base``: rules, states, point status, events, subscriptions, outbox.

``alarm_events`` is the audit trail: rows are only ever inserted. There is no update or delete path
in the code, and migration 0002 adds triggers that refuse UPDATE and DELETE on SQLite and
PostgreSQL. Its point/asset ids are plain integers (no foreign key) so the trail outlives an asset.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import JSON, Boolean, Float, ForeignKey, Index, Integer, String, Text, UniqueConstraint, text
from sqlalchemy.orm import Mapped, mapped_column

from server.storage.tables import Base, UTCDateTime, utcnow

EVENT_KINDS = ("transition", "data-quality", "acknowledged", "shelved", "unshelved")
SCOPES = ("site", "area", "asset")
MODES = ("immediate", "digest")
OUTBOX_STATES = ("pending", "sending", "sent", "failed")


class AlarmRule(Base):
    """A rule for one asset (all its points) or one point; point rules win over asset rules."""

    __tablename__ = "alarm_rules"
    __table_args__ = (Index("ix_alarm_rules_point_asset", "point_id", "asset_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    asset_id: Mapped[int | None] = mapped_column(ForeignKey("assets.id", ondelete="CASCADE"))
    point_id: Mapped[int | None] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"))
    metric: Mapped[str] = mapped_column(String(40))
    alert_level: Mapped[float | None] = mapped_column(Float)
    danger_level: Mapped[float | None] = mapped_column(Float)
    direction: Mapped[str] = mapped_column(String(8), default="above")
    zone_based: Mapped[bool] = mapped_column(Boolean, default=False)
    persist_k: Mapped[int] = mapped_column(Integer, default=2)
    persist_n: Mapped[int] = mapped_column(Integer, default=3)
    hysteresis: Mapped[float] = mapped_column(Float, default=0.1)
    enabled: Mapped[bool] = mapped_column(Boolean, default=True)
    is_default: Mapped[bool] = mapped_column(Boolean, default=False)
    updated_by: Mapped[str] = mapped_column(String(80), default="")
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AlarmState(Base):
    """The current level of one rule metric at one point (written when the level changes).

    The window of recent readings lives in :class:`AlarmPointStatus` (one row per point, updated per
    record); ``window`` here keeps the window as it was at the last transition.
    """

    __tablename__ = "alarm_states"
    __table_args__ = (UniqueConstraint("point_id", "metric"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"), index=True)
    asset_id: Mapped[int] = mapped_column(Integer, index=True)
    metric: Mapped[str] = mapped_column(String(40))
    rule_id: Mapped[int | None] = mapped_column(Integer)
    level: Mapped[str] = mapped_column(String(8), default="normal")
    window: Mapped[list] = mapped_column(JSON, default=list)
    since: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_value: Mapped[float | None] = mapped_column(Float)
    last_record_id: Mapped[int | None] = mapped_column(Integer)
    last_event_id: Mapped[int | None] = mapped_column(Integer)
    inactive_reason: Mapped[str | None] = mapped_column(String(200))
    acked_level: Mapped[str | None] = mapped_column(String(8))
    acked_by: Mapped[str | None] = mapped_column(String(80))
    acked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    ack_comment: Mapped[str | None] = mapped_column(Text)
    shelved_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    shelved_level: Mapped[str | None] = mapped_column(String(8))
    shelve_reason: Mapped[str | None] = mapped_column(Text)
    shelved_by: Mapped[str | None] = mapped_column(String(80))
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AlarmPointStatus(Base):
    """Per point: recent speeds (data-quality check), half-order history (trend), last metrics."""

    __tablename__ = "alarm_point_status"
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"), primary_key=True)
    speeds_hz: Mapped[list] = mapped_column(JSON, default=list)
    history: Mapped[list] = mapped_column(JSON, default=list)  # [[measured_ts, half-order mm/s], ...]
    windows: Mapped[dict] = mapped_column(JSON, default=dict)  # metric -> [[value, alert, danger], ...]
    window_fit: Mapped[dict] = mapped_column(JSON, default=dict)  # operating-window fit (margin.py)
    last_metrics: Mapped[dict] = mapped_column(JSON, default=dict)
    last_record_id: Mapped[int | None] = mapped_column(Integer)
    data_quality_open: Mapped[bool] = mapped_column(Boolean, default=False)
    data_quality_reason: Mapped[str | None] = mapped_column(Text)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AlarmEvent(Base):
    """One immutable entry of the audit trail."""

    __tablename__ = "alarm_events"
    __table_args__ = (
        Index("ix_alarm_events_point_created", "point_id", "created_at"),
        Index("ix_alarm_events_asset", "asset_id"),
    )
    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[str] = mapped_column(String(16))
    point_id: Mapped[int] = mapped_column(Integer)
    asset_id: Mapped[int] = mapped_column(Integer)
    area_id: Mapped[int | None] = mapped_column(Integer)
    site_id: Mapped[int | None] = mapped_column(Integer)
    metric: Mapped[str | None] = mapped_column(String(40))
    rule_id: Mapped[int | None] = mapped_column(Integer)
    from_level: Mapped[str | None] = mapped_column(String(8))
    to_level: Mapped[str | None] = mapped_column(String(8))
    value: Mapped[float | None] = mapped_column(Float)
    threshold: Mapped[float | None] = mapped_column(Float)
    record_id: Mapped[int | None] = mapped_column(Integer)
    result_id: Mapped[int | None] = mapped_column(Integer)
    actor: Mapped[str] = mapped_column(String(80), default="worker")
    comment: Mapped[str | None] = mapped_column(Text)
    summary: Mapped[str] = mapped_column(Text, default="")
    details: Mapped[dict] = mapped_column(JSON, default=dict)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AlarmIncident(Base):
    """One incident per machine: from the first rule of any of its points leaving normal until every rule
    of the machine is back to normal (migration 0009).

    ``level`` is the highest level of the machine's rules now; ``announced_level`` the highest level an
    email went out for (escalation emails go out only above it: one email per escalation). At most one
    open incident per machine (a partial unique index on ``asset_id`` where ``cleared_at`` is null).
    Like the audit trail, the ids of asset, area and site are plain integers.
    """

    __tablename__ = "alarm_incidents"
    __table_args__ = (
        Index("ux_alarm_incidents_open", "asset_id", unique=True, sqlite_where=text("cleared_at IS NULL"),
              postgresql_where=text("cleared_at IS NULL")),
        Index("ix_alarm_incidents_asset_opened", "asset_id", "opened_at"),
    )
    id: Mapped[int] = mapped_column(primary_key=True)
    asset_id: Mapped[int] = mapped_column(Integer)
    area_id: Mapped[int | None] = mapped_column(Integer)
    site_id: Mapped[int | None] = mapped_column(Integer)
    level: Mapped[str] = mapped_column(String(8), default="alert")
    peak_level: Mapped[str] = mapped_column(String(8), default="alert")
    announced_level: Mapped[str] = mapped_column(String(8), default="normal")
    opened_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    cleared_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    opened_record_id: Mapped[int | None] = mapped_column(Integer)
    last_record_id: Mapped[int | None] = mapped_column(Integer)
    emails: Mapped[int] = mapped_column(Integer, default=0)  # outbox rows queued for it (all addresses)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AlarmSubscription(Base):
    __tablename__ = "alarm_subscriptions"
    __table_args__ = (Index("ix_alarm_subscriptions_scope", "scope", "scope_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    email: Mapped[str] = mapped_column(String(200))
    scope: Mapped[str] = mapped_column(String(8))
    scope_id: Mapped[int] = mapped_column(Integer)
    min_level: Mapped[str] = mapped_column(String(8), default="alert")
    mode: Mapped[str] = mapped_column(String(12), default="immediate")
    digest_time: Mapped[str] = mapped_column(String(5), default="07:00")
    timezone: Mapped[str] = mapped_column(String(64), default="UTC")
    include_data_quality: Mapped[bool] = mapped_column(Boolean, default=False)
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    last_digest_date: Mapped[str | None] = mapped_column(String(10))
    created_by: Mapped[str] = mapped_column(String(80), default="")
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class OutboxMessage(Base):
    """One email to one recipient; ``dedupe_key`` makes a second copy impossible."""

    __tablename__ = "alarm_outbox"
    __table_args__ = (Index("ix_alarm_outbox_status_next", "status", "next_attempt_at"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    dedupe_key: Mapped[str] = mapped_column(String(200), unique=True)
    kind: Mapped[str] = mapped_column(String(12))
    event_id: Mapped[int | None] = mapped_column(ForeignKey("alarm_events.id"))
    subscription_id: Mapped[int | None] = mapped_column(
        ForeignKey("alarm_subscriptions.id", ondelete="SET NULL")
    )
    recipient: Mapped[str] = mapped_column(String(200))
    payload: Mapped[dict] = mapped_column(JSON, default=dict)  # snapshot the email is rendered from
    subject: Mapped[str] = mapped_column(String(300), default="")
    body_text: Mapped[str] = mapped_column(Text, default="")
    body_html: Mapped[str] = mapped_column(Text, default="")
    message_id: Mapped[str] = mapped_column(String(200))
    status: Mapped[str] = mapped_column(String(8), default="pending")
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    next_attempt_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    lease_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    claimed_by: Mapped[str | None] = mapped_column(String(120))
    last_error: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    sent_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
