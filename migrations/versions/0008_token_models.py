"""tokens limited to models: the names a token may reach (NULL: every model)

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-03 14:20:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # batch mode: SQLite alters a table by copying it (Alembic "batch migrations").
    with op.batch_alter_table("tokens") as batch:
        batch.add_column(sa.Column("models", sa.JSON(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("tokens") as batch:
        batch.drop_column("models")
