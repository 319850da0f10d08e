"""track record: live metrics per model, version and day, and the change alarm

``track_record_days`` keeps, per model, version and UTC day of the outcome, the
sums the live metrics are read from (engine.track_record.Tally);
``track_record_alarms`` keeps the Page-Hinkley test per model and version.
Both start empty: only outcomes received from now on are counted.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-03 14:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None

BigId = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "track_record_days",
        sa.Column("id", BigId, autoincrement=True, nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("version_id", sa.Integer(), nullable=False),
        sa.Column("day", sa.Date(), nullable=False),
        sa.Column("n", sa.BigInteger(), nullable=False),
        sa.Column("correct", sa.BigInteger(), nullable=False),
        sa.Column("log_loss_sum", sa.Double(), nullable=False),
        sa.Column("brier_sum", sa.Double(), nullable=False),
        sa.Column("abs_sum", sa.Double(), nullable=False),
        sa.Column("sq_sum", sa.Double(), nullable=False),
        sa.Column("y_mean", sa.Double(), nullable=False),
        sa.Column("y_m2", sa.Double(), nullable=False),
        sa.Column("calibration", sa.JSON(), nullable=False),
        sa.Column("auc_histogram", sa.LargeBinary(), nullable=True),
        sa.ForeignKeyConstraint(["model_id"], ["models.id"], ondelete="CASCADE",
                                name=op.f("fk_track_record_days_model_id_models")),
        sa.ForeignKeyConstraint(["version_id"], ["versions.id"], ondelete="CASCADE",
                                name=op.f("fk_track_record_days_version_id_versions")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_track_record_days")),
        sa.UniqueConstraint("model_id", "version_id", "day",
                            name=op.f("uq_track_record_days_model_id_version_id_day")),
    )
    op.create_index("ix_track_record_days_model_id_day", "track_record_days",
                    ["model_id", "day"])
    op.create_table(
        "track_record_alarms",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("version_id", sa.Integer(), nullable=False),
        sa.Column("n", sa.BigInteger(), nullable=False),
        sa.Column("mean", sa.Double(), nullable=False),
        sa.Column("cumulative", sa.Double(), nullable=False),
        sa.Column("minimum", sa.Double(), nullable=False),
        sa.Column("error_sum", sa.Double(), nullable=False),
        sa.Column("raised_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["model_id"], ["models.id"], ondelete="CASCADE",
                                name=op.f("fk_track_record_alarms_model_id_models")),
        sa.ForeignKeyConstraint(["version_id"], ["versions.id"], ondelete="CASCADE",
                                name=op.f("fk_track_record_alarms_version_id_versions")),
        sa.PrimaryKeyConstraint("model_id", "version_id", name=op.f("pk_track_record_alarms")),
    )


def downgrade() -> None:
    op.drop_table("track_record_alarms")
    op.drop_index("ix_track_record_days_model_id_day", table_name="track_record_days")
    op.drop_table("track_record_days")
