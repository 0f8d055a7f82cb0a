"""``record_tach``: the tachometer pulse times of a record (migration 0010), one row per record."""

from __future__ import annotations

from sqlalchemy import ForeignKey, Integer, LargeBinary, String
from sqlalchemy.orm import Mapped, mapped_column

from server.storage.tables import Base


class RecordTach(Base):
    __tablename__ = "record_tach"
    record_id: Mapped[int] = mapped_column(ForeignKey("records.id", ondelete="CASCADE"), primary_key=True)
    pulses_per_rev: Mapped[int] = mapped_column(Integer)
    n_pulses: Mapped[int] = mapped_column(Integer)
    pulses: Mapped[bytes] = mapped_column(LargeBinary)  # little-endian float64 pulse times, s from sample 0
    source: Mapped[str] = mapped_column(String(16))  # "times" | "channel"
