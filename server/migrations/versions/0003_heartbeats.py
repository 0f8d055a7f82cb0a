"""Service heartbeats: one row per worker or MQTT bridge (read by /readyz and /metrics).

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-01
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "service_heartbeats",
        sa.Column("id", sa.String(length=160), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("host", sa.String(length=120), nullable=False),
        sa.Column("pid", sa.Integer(), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("beat_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("status", sa.String(length=32), nullable=False),
        sa.Column("stats", sa.JSON(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_service_heartbeats")),
    )
    op.create_index("ix_service_heartbeats_kind_beat", "service_heartbeats", ["kind", "beat_at"])


def downgrade() -> None:
    op.drop_index("ix_service_heartbeats_kind_beat", table_name="service_heartbeats")
    op.drop_table("service_heartbeats")
