"""Retention: pinned readings and the markers of removed waveforms.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02

* ``record_pins``: readings an engineer keeps whatever their age (server/retention/tables.py).
* ``waveform_removals``: one row per reading whose raw waveform retention deleted (same transaction).
* Chart spectra: new results are written in the compact form (server/storage/packing.py); earlier rows
  stay readable as they are, so nothing is rewritten here.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "record_pins",
        sa.Column("record_id", sa.Integer(), sa.ForeignKey("records.id", ondelete="CASCADE",
                                                           name="fk_record_pins_record_id_records"),
                  nullable=False),
        sa.Column("pinned_by", sa.String(120), nullable=False),
        sa.Column("pinned_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("note", sa.Text(), nullable=False),
        sa.PrimaryKeyConstraint("record_id", name="pk_record_pins"),
    )
    op.create_table(
        "waveform_removals",
        sa.Column("record_id", sa.Integer(), sa.ForeignKey("records.id", ondelete="CASCADE",
                                                           name="fk_waveform_removals_record_id_records"),
                  nullable=False),
        sa.Column("removed_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("removed_bytes", sa.Integer(), nullable=False),
        sa.Column("reason", sa.String(200), nullable=False),
        sa.Column("audit_id", sa.Integer(), nullable=True),
        sa.PrimaryKeyConstraint("record_id", name="pk_waveform_removals"),
    )


def downgrade() -> None:
    op.drop_table("waveform_removals")
    op.drop_table("record_pins")
