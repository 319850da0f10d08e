"""trainer back-off: why a model cannot be trained now, and when to try again

``trainers.error`` keeps its meaning (the lineage diverged; it waits for a
promotion). A model a worker cannot load or train (a spec, record or snapshot
it cannot read, an unexpected failure) is now backed off alone instead:
``fault`` says why, ``faults`` counts the tries that failed in a row and
``retry_at`` is when the next may start. Existing rows start with no fault.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-03 10:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("trainers", schema=None) as batch_op:
        batch_op.add_column(sa.Column("fault", sa.Text(), nullable=True))
        batch_op.add_column(sa.Column("faults", sa.Integer(), server_default="0",
                                      nullable=False))
        batch_op.add_column(sa.Column("retry_at", sa.DateTime(timezone=True), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("trainers", schema=None) as batch_op:
        batch_op.drop_column("retry_at")
        batch_op.drop_column("faults")
        batch_op.drop_column("fault")
