"""Tachometer / once-per-revolution pulse data beside a record: table ``record_tach``.

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-02

One row per record that came with tach pulses: pulses per revolution, the count, the pulse times (s from
the record's first sample, little-endian float64) and whether they were sent as times or found in a pulse
channel at ingest (server/tach/). Deleting a record deletes its row.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "record_tach",
        sa.Column("record_id", sa.Integer(), sa.ForeignKey("records.id", ondelete="CASCADE",
                                                           name="fk_record_tach_record_id_records"),
                  nullable=False),
        sa.Column("pulses_per_rev", sa.Integer(), nullable=False),
        sa.Column("n_pulses", sa.Integer(), nullable=False),
        sa.Column("pulses", sa.LargeBinary(), nullable=False),
        sa.Column("source", sa.String(16), nullable=False),
        sa.PrimaryKeyConstraint("record_id", name="pk_record_tach"),
    )


def downgrade() -> None:
    op.drop_table("record_tach")
