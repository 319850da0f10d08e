"""forgotten records: each version counts the records it was trained on
(itself or through the versions it descends from) that have since been
forgotten (POST /v1/models/{name}/records/forget)

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-03 15:30:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # batch mode: SQLite alters a table by copying it (Alembic "batch migrations").
    with op.batch_alter_table("versions") as batch:
        batch.add_column(sa.Column("forgotten_records", sa.BigInteger(), nullable=False,
                                   server_default="0"))


def downgrade() -> None:
    with op.batch_alter_table("versions") as batch:
        batch.drop_column("forgotten_records")
