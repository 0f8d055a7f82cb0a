"""Alarm incidents per machine; the margin rule's default persistence and hysteresis.

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-02

``alarm_incidents``: one row per machine and incident (first rule of any point leaving normal until all
are back), at most one open per machine (partial unique index). Default threshold-margin rules still on
the former 2 of 3 readings and 10 % band move to 3 of 4 and 50 %, like the slow trend rules; a rule an
engineer set is left alone.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "alarm_incidents",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("asset_id", sa.Integer(), nullable=False),
        sa.Column("area_id", sa.Integer(), nullable=True),
        sa.Column("site_id", sa.Integer(), nullable=True),
        sa.Column("level", sa.String(length=8), nullable=False),
        sa.Column("peak_level", sa.String(length=8), nullable=False),
        sa.Column("announced_level", sa.String(length=8), nullable=False),
        sa.Column("opened_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("cleared_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("opened_record_id", sa.Integer(), nullable=True),
        sa.Column("last_record_id", sa.Integer(), nullable=True),
        sa.Column("emails", sa.Integer(), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_alarm_incidents")),
    )
    op.create_index("ux_alarm_incidents_open", "alarm_incidents", ["asset_id"], unique=True,
                    sqlite_where=sa.text("cleared_at IS NULL"),
                    postgresql_where=sa.text("cleared_at IS NULL"))
    op.create_index("ix_alarm_incidents_asset_opened", "alarm_incidents", ["asset_id", "opened_at"])
    rules = sa.table("alarm_rules", sa.column("metric", sa.String), sa.column("is_default", sa.Boolean),
                     sa.column("persist_k", sa.Integer), sa.column("persist_n", sa.Integer),
                     sa.column("hysteresis", sa.Float))
    op.execute(rules.update().where(rules.c.metric == "threshold_margin", rules.c.is_default.is_(True),
                                    rules.c.persist_k == 2, rules.c.persist_n == 3)
               .values(persist_k=3, persist_n=4, hysteresis=0.5))


def downgrade() -> None:
    rules = sa.table("alarm_rules", sa.column("metric", sa.String), sa.column("is_default", sa.Boolean),
                     sa.column("persist_k", sa.Integer), sa.column("persist_n", sa.Integer),
                     sa.column("hysteresis", sa.Float))
    op.execute(rules.update().where(rules.c.metric == "threshold_margin", rules.c.is_default.is_(True),
                                    rules.c.persist_k == 3, rules.c.persist_n == 4)
               .values(persist_k=2, persist_n=3, hysteresis=0.1))
    op.drop_index("ix_alarm_incidents_asset_opened", table_name="alarm_incidents")
    op.drop_index("ux_alarm_incidents_open", table_name="alarm_incidents")
    op.drop_table("alarm_incidents")
