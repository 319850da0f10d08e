"""scored cases: keyed predictions kept until their outcome arrives

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03 14:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

BigId = sa.BigInteger().with_variant(sa.Integer(), "sqlite")
# Labels and outputs as the records table keeps them: TEXT on SQLite (exact numbers,
# see service/store/tables/base.py TextJSON), JSON elsewhere.
LabelJSON = sa.JSON().with_variant(sa.Text(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "scored_cases",
        sa.Column("id", BigId, autoincrement=True, nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=200), nullable=False),
        sa.Column("features", sa.JSON(), nullable=False),
        sa.Column("version_id", sa.Integer(), nullable=True),
        sa.Column("output", LabelJSON, nullable=False),
        sa.Column("scored_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("rescored", sa.Integer(), server_default="0", nullable=False),
        sa.Column("outcome", LabelJSON, nullable=True),
        sa.Column("outcome_at", sa.DateTime(timezone=True), nullable=True),
        sa.ForeignKeyConstraint(["model_id"], ["models.id"], ondelete="CASCADE",
                                name=op.f("fk_scored_cases_model_id_models")),
        sa.ForeignKeyConstraint(["version_id"], ["versions.id"], ondelete="SET NULL",
                                name=op.f("fk_scored_cases_version_id_versions")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_scored_cases")),
        sa.UniqueConstraint("model_id", "key", name=op.f("uq_scored_cases_model_id_key")),
    )
    op.create_index("ix_scored_cases_unresolved", "scored_cases",
                    ["model_id", "outcome_at", "scored_at"])


def downgrade() -> None:
    op.drop_index("ix_scored_cases_unresolved", table_name="scored_cases")
    op.drop_table("scored_cases")
