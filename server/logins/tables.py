"""``login_attempts``: one row per login attempt and key (``user:<name>``, ``addr:<client address>``).

A row is written *before* the password is hashed, so concurrent attempts see each other; a successful
login deletes its own rows and the user name's earlier ones. Rows older than the throttle window are
pruned as new attempts arrive. Times are epoch seconds (``at_s``) so every process compares the same
clock. Every API process of a deployment shares the table, so the limit holds for the deployment,
not per process.
"""

from __future__ import annotations

from sqlalchemy import Float, Index, Integer, String
from sqlalchemy.orm import Mapped, mapped_column

from server.storage.tables import Base


class LoginAttempt(Base):
    __tablename__ = "login_attempts"
    __table_args__ = (Index("ix_login_attempts_key_at_s", "key", "at_s"),
                      Index("ix_login_attempts_at_s", "at_s"))
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    key: Mapped[str] = mapped_column(String(200))
    at_s: Mapped[float] = mapped_column(Float)
