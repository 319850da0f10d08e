"""site secrets: a secret the service generates once and every API process
shares (the page session key when KEELSON_SECRET_KEY is not set), and the
page sessions signed out before their cookies expired

Revision ID: 0012
Revises: 0011
Create Date: 2026-12-03 15:30:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0012"
down_revision = "0011"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "site_secrets",
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("value", sa.String(length=128), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_site_secrets")),
    )
    # Page sessions signed out before their cookie expired.
    op.create_table(
        "ended_sessions",
        sa.Column("nonce", sa.String(length=64), nullable=False),
        sa.Column("ends_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("nonce", name=op.f("pk_ended_sessions")),
    )


def downgrade() -> None:
    op.drop_table("ended_sessions")
    op.drop_table("site_secrets")
