"""``service_heartbeats``: one row per running worker or MQTT bridge, updated every few seconds.

A row carries the instance's cumulative counters (``stats``, JSON), so ``/metrics`` on any API
process reports the work done by workers and bridges running in other processes or on other hosts.
Rows of stopped instances stay (their counters keep the totals monotonic) until they are pruned.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import JSON, Index, Integer, String
from sqlalchemy.orm import Mapped, mapped_column

from server.storage.tables import Base, UTCDateTime, utcnow

KINDS = ("worker", "mqtt-bridge")


class ServiceHeartbeat(Base):
    __tablename__ = "service_heartbeats"
    __table_args__ = (Index("ix_service_heartbeats_kind_beat", "kind", "beat_at"),)
    id: Mapped[str] = mapped_column(String(160), primary_key=True)
    kind: Mapped[str] = mapped_column(String(16))
    host: Mapped[str] = mapped_column(String(120), default="")
    pid: Mapped[int] = mapped_column(Integer, default=0)
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    beat_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    status: Mapped[str] = mapped_column(String(32), default="running")
    stats: Mapped[dict] = mapped_column(JSON, default=dict)
