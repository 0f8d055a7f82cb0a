"""Configuration audit trail: ``config_changes``, append-only (UPDATE and DELETE refused by triggers).

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-01
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

_SQLITE = (
    "CREATE TRIGGER config_changes_no_update BEFORE UPDATE ON config_changes "
    "BEGIN SELECT RAISE(ABORT, 'config_changes is an audit trail: rows cannot be changed'); END",
    "CREATE TRIGGER config_changes_no_delete BEFORE DELETE ON config_changes "
    "BEGIN SELECT RAISE(ABORT, 'config_changes is an audit trail: rows cannot be deleted'); END",
)
_PG = (
    """CREATE FUNCTION config_changes_refuse() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
    RAISE EXCEPTION 'config_changes is an audit trail: rows cannot be changed or deleted';
    END $$""",
    "CREATE TRIGGER config_changes_append_only BEFORE UPDATE OR DELETE ON config_changes "
    "FOR EACH ROW EXECUTE FUNCTION config_changes_refuse()",
)


def upgrade() -> None:
    op.create_table(
        "config_changes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("actor", sa.String(length=120), nullable=False),
        sa.Column("action", sa.String(length=40), nullable=False),
        sa.Column("target", sa.String(length=40), nullable=False),
        sa.Column("target_id", sa.Integer(), nullable=True),
        sa.Column("details", sa.JSON(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_config_changes")),
    )
    op.create_index("ix_config_changes_target", "config_changes", ["target", "target_id"])
    for statement in _PG if op.get_bind().dialect.name == "postgresql" else _SQLITE:
        op.execute(statement)


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        op.execute("DROP TRIGGER IF EXISTS config_changes_append_only ON config_changes")
        op.execute("DROP FUNCTION IF EXISTS config_changes_refuse()")
    op.drop_index("ix_config_changes_target", table_name="config_changes")
    op.drop_table("config_changes")
