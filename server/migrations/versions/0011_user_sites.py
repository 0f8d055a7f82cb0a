"""A user may be limited to one site, as an API key may.

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-03

``users.site_id`` (NULL: every site, as before). A user limited to a site sees and changes that site's data
only, through the same checks an API key limited to a site goes through (server/security.py,
``Principal.site_id``). Deleting the site deletes the users limited to it, as it does their keys: a
limit is never widened to every site by a deletion.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("users") as batch:
        batch.add_column(sa.Column("site_id", sa.Integer(), nullable=True))
        batch.create_foreign_key(batch.f("fk_users_site_id_sites"), "sites", ["site_id"], ["id"],
                                 ondelete="CASCADE")


def downgrade() -> None:
    with op.batch_alter_table("users") as batch:
        batch.drop_constraint(batch.f("fk_users_site_id_sites"), type_="foreignkey")
        batch.drop_column("site_id")
