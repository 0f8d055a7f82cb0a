"""Retention tables: readings pinned by an engineer, and the marker left where a waveform was removed.

A ``waveform_removals`` row is written in the same transaction that deletes the waveform, so a reading
either still has its samples or says when and why they went (never neither). Migration 0006.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import ForeignKey, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column

from server.storage.tables import Base, UTCDateTime, utcnow


class RecordPin(Base):
    """An engineer keeps this reading's raw waveform whatever its age (audited as pin / unpin)."""

    __tablename__ = "record_pins"
    record_id: Mapped[int] = mapped_column(ForeignKey("records.id", ondelete="CASCADE"), primary_key=True)
    pinned_by: Mapped[str] = mapped_column(String(120))
    pinned_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    note: Mapped[str] = mapped_column(Text, default="")


class WaveformRemoval(Base):
    """The raw waveform of this reading was deleted by retention; its result and chart spectrum stay."""

    __tablename__ = "waveform_removals"
    record_id: Mapped[int] = mapped_column(ForeignKey("records.id", ondelete="CASCADE"), primary_key=True)
    removed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    removed_bytes: Mapped[int] = mapped_column(Integer)  # stored bytes freed (samples + uploaded file)
    reason: Mapped[str] = mapped_column(String(200))
    audit_id: Mapped[int | None] = mapped_column(Integer)  # the config_changes row of its batch
