"""record labels as TEXT on SQLite

SQLite gave ``records.label`` (declared JSON) NUMERIC affinity, so a bare
number was converted to a REAL by SQLite's own, not always correctly rounded,
text-to-double conversion (see ``service.store.tables.TextJSON``). From here on the
column has TEXT affinity and keeps the JSON text as written. Labels already
stored as REALs are rewritten as the shortest text of the double SQLite kept
(what Python's ``repr`` gives), not through SQLite's own REAL-to-TEXT
conversion, which keeps only 15 significant digits. PostgreSQL is unchanged.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02 02:55:00
"""

from __future__ import annotations

import json

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    connection = op.get_bind()
    if connection.dialect.name != "sqlite":
        return
    reals = connection.execute(
        sa.text("SELECT seq, label FROM records WHERE typeof(label) = 'real'")
    ).all()
    with op.batch_alter_table("records", schema=None) as batch_op:
        batch_op.alter_column("label", existing_type=sa.JSON(), type_=sa.Text(),
                              existing_nullable=False)
    if reals:
        connection.execute(
            sa.text("UPDATE records SET label = :label WHERE seq = :seq"),
            [{"seq": seq, "label": json.dumps(float(label))} for seq, label in reals],
        )


def downgrade() -> None:
    if op.get_bind().dialect.name != "sqlite":
        return
    with op.batch_alter_table("records", schema=None) as batch_op:
        batch_op.alter_column("label", existing_type=sa.Text(), type_=sa.JSON(),
                              existing_nullable=False)
