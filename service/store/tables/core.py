"""The core tables: models, their trainers, records, versions, history, jobs and tokens."""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    DateTime,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column

from service.store.tables.base import Base, BigId, LabelJSON, utcnow


class ModelRow(Base):
    """A model: its spec, its record counters and the active version pointer.

    Ingestion locks this row (``FOR NO KEY UPDATE``) for the length of its
    transaction, so the records of one model commit in sequence order
    (docs/architecture.md, invariant 1); the counters are kept here under that same lock instead of
    counted per request.
    """

    __tablename__ = "models"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    spec: Mapped[dict[str, Any]]
    active_version_id: Mapped[int | None] = mapped_column(
        ForeignKey("versions.id", use_alter=True, ondelete="SET NULL")
    )
    records_train: Mapped[int] = mapped_column(BigInteger, default=0)
    records_holdout: Mapped[int] = mapped_column(BigInteger, default=0)
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    # Set once a delete was accepted: the name the model had. The row then
    # carries a tombstone ``name`` (``tombstone_name``) that no request can
    # address, so the model is gone at once and its name free for a new one;
    # the row stays as the anchor of its delete job (service/worker/deletion.py).
    deleted_name: Mapped[str | None] = mapped_column(String(64))


def tombstone_name(model_id: int) -> str:
    """The name a deleted model's row takes: unique, and never a valid model
    name (``~`` is outside the name pattern), so lookups by name miss it."""
    return f"~{model_id}"


class TrainerRow(Base):
    """The online trainer's position for one model, and the lease on it.

    Kept apart from ``models`` so a worker's heartbeat never waits on the row
    lock an ingest transaction holds.
    """

    __tablename__ = "trainers"

    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    cursor: Mapped[int] = mapped_column(BigInteger, default=0)
    head_version_id: Mapped[int | None] = mapped_column(
        ForeignKey("versions.id", ondelete="SET NULL")
    )
    leased_by: Mapped[str | None] = mapped_column(String(128))
    lease_expires_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    # Set when the lineage diverged (a non-finite step): no worker takes the
    # model until a version of another lineage is promoted.
    error: Mapped[str | None] = mapped_column(Text)
    # Set when a worker could not load or train the model (a spec, record or
    # snapshot it cannot read, an unexpected failure): why, how many tries in a
    # row have failed, and when the next may start (the back-off, see
    # service/worker/faults.py). Cleared by the next try that stores progress.
    fault: Mapped[str | None] = mapped_column(Text)
    faults: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    retry_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    # Set while an admin has paused online training: no worker leases the
    # model (leasing.py), records still arrive and wait.
    paused_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    updated_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)

    def clear_fault(self) -> None:
        """The model trains again: forget its fault (in the caller's transaction)."""
        if self.fault is not None or self.faults or self.retry_at is not None:
            self.fault, self.faults, self.retry_at = None, 0, None


class RecordRow(Base):
    """One labelled record. ``seq`` is the global sequence: the training order."""

    __tablename__ = "records"
    __table_args__ = (
        UniqueConstraint("model_id", "key"),
        Index("ix_records_model_id_seq", "model_id", "seq"),
    )

    seq: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    key: Mapped[str | None] = mapped_column(String(200))
    features: Mapped[dict[str, Any]]
    label: Mapped[Any] = mapped_column(LabelJSON)
    split: Mapped[str] = mapped_column(String(8))  # "train" or "holdout"
    received_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)


class VersionRow(Base):
    """An immutable trained state. Only ``status``, ``promoted_at`` and
    ``forgotten_records`` ever change."""

    __tablename__ = "versions"
    __table_args__ = (UniqueConstraint("model_id", "number"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    number: Mapped[int] = mapped_column(Integer)
    origin: Mapped[str] = mapped_column(String(16))  # "online" or "retrain"
    status: Mapped[str] = mapped_column(String(16))  # "active", "candidate", "retired"
    snapshot: Mapped[bytes] = mapped_column(LargeBinary)
    cursor: Mapped[int] = mapped_column(BigInteger)
    records_seen: Mapped[int] = mapped_column(BigInteger)
    metrics: Mapped[dict[str, Any]]
    parent_id: Mapped[int | None] = mapped_column(ForeignKey("versions.id", ondelete="SET NULL"))
    job_id: Mapped[int | None] = mapped_column(Integer)
    # The record position of the settings change this version was trained
    # under (0: the settings it was created with; None: made before settings
    # could change). The change itself is in the model's history.
    settings_from_seq: Mapped[int | None] = mapped_column(BigInteger)
    # How many records this version was trained on, itself or through the
    # versions it descends from, that have since been forgotten: set by the
    # forget (service/usecases/forgetting.py), inherited from the parent when
    # a version is written (service/versions/writes.py). Its weights still
    # carry them; only a retrain from scratch without them is free of them.
    forgotten_records: Mapped[int] = mapped_column(BigInteger, default=0, server_default="0")
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    promoted_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))


class ModelEventRow(Base):
    """One entry of a model's history (GET /v1/models/{name}/history): what
    happened (``kind``), who did it (the token's name; None for the worker's
    own acts), why (the admin's optional reason), and the model's last record
    sequence at that moment (``at_seq``: where a settings change takes
    effect). Written in the transaction of the act it records."""

    __tablename__ = "model_events"
    __table_args__ = (Index("ix_model_events_model_id_id", "model_id", "id"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    kind: Mapped[str] = mapped_column(String(32))
    token: Mapped[str | None] = mapped_column(String(100))
    reason: Mapped[str | None] = mapped_column(Text)
    at_seq: Mapped[int] = mapped_column(BigInteger)
    details: Mapped[dict[str, Any]]
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)


class JobRow(Base):
    """A queued piece of work for a worker: a retrain or a model's delete."""

    __tablename__ = "jobs"
    __table_args__ = (Index("ix_jobs_status_id", "status", "id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    kind: Mapped[str] = mapped_column(String(16))
    status: Mapped[str] = mapped_column(String(16))  # queued, running, succeeded, failed
    params: Mapped[dict[str, Any]]
    progress: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    version_id: Mapped[int | None] = mapped_column(ForeignKey("versions.id", ondelete="SET NULL"))
    error: Mapped[str | None] = mapped_column(Text)
    leased_by: Mapped[str | None] = mapped_column(String(128))
    lease_expires_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    started_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    finished_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))


class TokenRow(Base):
    """A bearer token, kept only as its SHA-256 hash."""

    __tablename__ = "tokens"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(100))
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    scopes: Mapped[list[Any]]
    # The model names this token may reach, sorted; None reaches every model.
    # Names, not ids: the name is what the API addresses, and a limit must never
    # widen to "every model" because a model row went away.
    models: Mapped[list[Any] | None] = mapped_column(JSON, nullable=True)
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))


