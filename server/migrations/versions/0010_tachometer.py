"""Tachometer / once-per-revolution pulse data beside a record.

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-02

Placeholder in the migration chain: upgrade and downgrade do nothing until the owner fills them in.
"""

from __future__ import annotations

import sqlalchemy as sa  # noqa: F401
from alembic import op  # noqa: F401

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None


def upgrade() -> None:
    pass


def downgrade() -> None:
    pass
