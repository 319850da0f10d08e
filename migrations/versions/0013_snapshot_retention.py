"""snapshot retention: a version's snapshot may be pruned (``snapshot`` NULL,
``pruned_at`` set) while its row, metrics and lineage stay; drift tallies
are found by hour for their retention

Revision ID: 0013
Revises: 0012
Create Date: 2026-12-03 15:30:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0013"
down_revision = "0012"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # batch mode: SQLite alters a table by copying it (Alembic "batch migrations").
    with op.batch_alter_table("versions") as batch:
        batch.alter_column("snapshot", existing_type=sa.LargeBinary(), nullable=True)
        batch.add_column(sa.Column("pruned_at", sa.DateTime(timezone=True), nullable=True))
    # Drift tally retention finds the old hours by index, not by a scan.
    op.create_index("ix_drift_tallies_bucket_start", "drift_tallies", ["bucket_start"])


def downgrade() -> None:
    op.drop_index("ix_drift_tallies_bucket_start", table_name="drift_tallies")
    # A pruned version has no snapshot to put back: its row cannot survive a
    # column that may not be empty, so it goes (its lineage children keep
    # their parent as NULL, as the foreign key says).
    op.execute("DELETE FROM versions WHERE snapshot IS NULL")
    with op.batch_alter_table("versions") as batch:
        batch.drop_column("pruned_at")
        batch.alter_column("snapshot", existing_type=sa.LargeBinary(), nullable=False)
