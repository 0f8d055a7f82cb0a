"""The configuration audit trail: who changed which setting, rule, asset, user or key, and when.

Rows are only ever inserted (migration 0004 adds triggers that refuse UPDATE and DELETE on SQLite and
PostgreSQL). Acknowledgements and shelving are audited with the alarm events (``alarm_events``).
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import JSON, Index, Integer, String
from sqlalchemy.orm import Mapped, mapped_column

from server.storage.tables import Base, UTCDateTime, utcnow


class ConfigChange(Base):
    __tablename__ = "config_changes"
    __table_args__ = (Index("ix_config_changes_target", "target", "target_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    actor: Mapped[str] = mapped_column(String(120))
    action: Mapped[str] = mapped_column(String(40))  # create, update, deactivate, revoke, delete, set
    target: Mapped[str] = mapped_column(String(40))  # site, area, asset, point, route, user, api_key, ...
    target_id: Mapped[int | None] = mapped_column(Integer)
    details: Mapped[dict] = mapped_column(JSON, default=dict)
