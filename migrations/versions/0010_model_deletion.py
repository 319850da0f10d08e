"""model deletion: a model being deleted keeps its row under a tombstone name
and its former name in ``deleted_name`` until its delete job has finished

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-03 14:30:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # batch mode: SQLite alters a table by copying it (Alembic "batch migrations").
    with op.batch_alter_table("models") as batch:
        batch.add_column(sa.Column("deleted_name", sa.String(length=64), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("models") as batch:
        batch.drop_column("deleted_name")
