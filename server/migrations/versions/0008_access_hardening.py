"""Shared login-attempt counters (``login_attempts``, read by the login throttle of every API process).

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-02

The outbox already keeps ``attempts`` and ``last_error`` (0002), which the build-failure path uses.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "login_attempts",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=200), nullable=False),
        sa.Column("at_s", sa.Float(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_login_attempts")),
    )
    op.create_index("ix_login_attempts_key_at_s", "login_attempts", ["key", "at_s"])
    op.create_index("ix_login_attempts_at_s", "login_attempts", ["at_s"])


def downgrade() -> None:
    op.drop_index("ix_login_attempts_at_s", table_name="login_attempts")
    op.drop_index("ix_login_attempts_key_at_s", table_name="login_attempts")
    op.drop_table("login_attempts")
