"""Result metrics as typed columns that name their measure (peak / r.m.s., unit).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02

Placeholder in the migration chain: upgrade and downgrade do nothing until the owner fills them in.
"""

from __future__ import annotations

import sqlalchemy as sa  # noqa: F401
from alembic import op  # noqa: F401

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    pass


def downgrade() -> None:
    pass
