"""drift tallies: predictions counted per reference bin, per API process and hour

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-03 14:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "drift_tallies",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
                  autoincrement=True, nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("version_id", sa.Integer(), nullable=False),
        sa.Column("bucket_start", sa.DateTime(timezone=True), nullable=False),
        sa.Column("writer", sa.String(length=64), nullable=False),
        sa.Column("predictions", sa.BigInteger(), nullable=False),
        sa.Column("counts", sa.LargeBinary(), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["model_id"], ["models.id"],
                                name=op.f("fk_drift_tallies_model_id_models"),
                                ondelete="CASCADE"),
        sa.ForeignKeyConstraint(["version_id"], ["versions.id"],
                                name=op.f("fk_drift_tallies_version_id_versions"),
                                ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_drift_tallies")),
        sa.UniqueConstraint("model_id", "version_id", "bucket_start", "writer",
                            name=op.f("uq_drift_tallies_model_id_version_id_bucket_start_writer")),
    )


def downgrade() -> None:
    op.drop_table("drift_tallies")
