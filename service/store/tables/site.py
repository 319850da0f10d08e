"""Secrets and ended sessions of the pages (service/web/pages/session.py)."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import (
    DateTime,
    String,
)
from sqlalchemy.orm import Mapped, mapped_column

from service.store.tables.base import Base, utcnow

# ---------------------------------------------------------------------------
# Secrets the service makes for itself, shared by every API process.


class SiteSecretRow(Base):
    """A secret generated once by the first process that needed it (the page
    session key when KEELSON_SECRET_KEY is not set), read by every other."""

    __tablename__ = "site_secrets"

    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(String(128))
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)


class EndedSessionRow(Base):
    """A page session signed out before its cookie expired: its nonce is
    refused until ``ends_at`` (the cookie's own end), then the row may go."""

    __tablename__ = "ended_sessions"

    nonce: Mapped[str] = mapped_column(String(64), primary_key=True)
    ends_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
