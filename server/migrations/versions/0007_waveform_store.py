"""Waveform store backends (database or content-addressed files) and time indexes at scale.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02

* ``waveforms.store`` ("database": the samples are in ``data``; "files": in a content-addressed file named
  by ``waveforms.digest``) and ``waveforms.digest`` with a partial index (rows in files only), so deleting
  one record can tell whether another still refers to the same file (server/storage/waveforms.py).
  Existing rows become "database" through the column default; nothing is rewritten.
* PostgreSQL only: ``ix_results_trend_pg`` on ``results (point_id, measured_ts) WHERE current`` with the chart
  columns included, so the trend of one point is an index-only scan at ten million results
  (docs/scale.md). SQLite keeps ``ix_results_point_ts``.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None

TREND_INCLUDE = ["record_id", "sub_detected", "sub_velocity_rms_mm_s", "one_x_velocity_rms_mm_s",
                 "sub_accel_peak", "one_x_accel_peak", "overall_velocity_rms_mm_s", "growth_rate_per_s",
                 "forcing_hz", "precursor_rate_per_s"]


def upgrade() -> None:
    op.add_column("waveforms", sa.Column("store", sa.String(16), nullable=False, server_default="database"))
    op.add_column("waveforms", sa.Column("digest", sa.String(64), nullable=True))
    op.create_index("ix_waveforms_digest", "waveforms", ["digest"],
                    sqlite_where=sa.text("digest IS NOT NULL"),
                    postgresql_where=sa.text("digest IS NOT NULL"))
    if op.get_bind().dialect.name == "postgresql":
        op.create_index("ix_results_trend_pg", "results", ["point_id", "measured_ts"],
                        postgresql_where=sa.text("current"), postgresql_include=TREND_INCLUDE)


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        op.drop_index("ix_results_trend_pg", table_name="results")
    op.drop_index("ix_waveforms_digest", table_name="waveforms")
    with op.batch_alter_table("waveforms") as batch:
        batch.drop_column("digest")
        batch.drop_column("store")
