"""Waveform store backends (database or content-addressed files) and time indexes at scale.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02

Placeholder in the migration chain: upgrade and downgrade do nothing until the owner fills them in.
"""

from __future__ import annotations

import sqlalchemy as sa  # noqa: F401
from alembic import op  # noqa: F401

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def upgrade() -> None:
    pass


def downgrade() -> None:
    pass
