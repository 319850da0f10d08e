"""a model's history (model_events), pausing its online training, and the
settings position each version was trained under

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-03 14:30:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None

# SQLite only autoincrements an INTEGER PRIMARY KEY; BIGINT elsewhere.
_BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "model_events",
        sa.Column("id", _BIG_ID, primary_key=True, autoincrement=True),
        sa.Column("model_id", sa.Integer(),
                  sa.ForeignKey("models.id", ondelete="CASCADE",
                                name="fk_model_events_model_id_models"), nullable=False),
        sa.Column("kind", sa.String(32), nullable=False),
        sa.Column("token", sa.String(100), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("at_seq", sa.BigInteger(), nullable=False),
        sa.Column("details", sa.JSON(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_model_events"),
    )
    op.create_index("ix_model_events_model_id_id", "model_events", ["model_id", "id"])
    # batch mode: SQLite alters a table by copying it (Alembic "batch migrations").
    with op.batch_alter_table("trainers") as batch:
        batch.add_column(sa.Column("paused_at", sa.DateTime(timezone=True), nullable=True))
    with op.batch_alter_table("versions") as batch:
        batch.add_column(sa.Column("settings_from_seq", sa.BigInteger(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("versions") as batch:
        batch.drop_column("settings_from_seq")
    with op.batch_alter_table("trainers") as batch:
        batch.drop_column("paused_at")
    op.drop_index("ix_model_events_model_id_id", table_name="model_events")
    op.drop_table("model_events")
