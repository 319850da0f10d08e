"""The store: typed SQLAlchemy 2 mapping of what Keelson keeps.

Rows are named for what they are (``ModelRow``, ``RecordRow`` ...): the word
*model* belongs to the domain, so the declarative base is ``Base``.
Alembic (migrations/) is the only way this schema reaches a database; change a
class here, then add a numbered revision.
"""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Date,
    DateTime,
    Double,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
)
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

# Alembic docs/build/naming.rst: every constraint gets a deterministic name, so
# migrations can drop or alter it by name on every backend.
NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

# SQLite only autoincrements an INTEGER PRIMARY KEY; BIGINT elsewhere.
BigId = BigInteger().with_variant(Integer(), "sqlite")


class TextJSON(TypeDecorator[Any]):
    """A JSON value kept as TEXT (used on SQLite for record labels).

    SQLite gives a column declared ``JSON`` NUMERIC affinity (SQLite
    documentation, "Datatypes In SQLite", 3.1): a bare number, as a regression
    label is, is converted to a REAL on the way in by SQLite's own
    text-to-double conversion, which is not always correctly rounded
    (``4.041736865667259e-301`` came back as ``4.0417368656672585e-301``). TEXT
    affinity keeps the text the service wrote, so the label read is the label
    sent, bit for bit."""

    impl = Text
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: Dialect) -> str | None:
        return None if value is None else json.dumps(value, allow_nan=False)

    def process_result_value(self, value: Any, dialect: Dialect) -> Any:
        return None if value is None else json.loads(value)


# JSON on PostgreSQL (which keeps numbers exactly), TEXT on SQLite (see TextJSON).
LabelJSON = JSON().with_variant(TextJSON(), "sqlite")


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


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
    """An immutable trained state. Only ``status`` and ``promoted_at`` ever
    change, and ``snapshot`` once: snapshot retention (service/worker/
    snapshot_retention.py) may empty it (``pruned_at`` says when) for an old
    version that was never active; the row, its metrics and lineage stay."""

    __tablename__ = "versions"
    __table_args__ = (UniqueConstraint("model_id", "number"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    number: Mapped[int] = mapped_column(Integer)
    origin: Mapped[str] = mapped_column(String(16))  # "online" or "retrain"
    status: Mapped[str] = mapped_column(String(16))  # "active", "candidate", "retired"
    snapshot: Mapped[bytes | None] = mapped_column(LargeBinary)
    cursor: Mapped[int] = mapped_column(BigInteger)
    records_seen: Mapped[int] = mapped_column(BigInteger)
    metrics: Mapped[dict[str, Any]]
    parent_id: Mapped[int | None] = mapped_column(ForeignKey("versions.id", ondelete="SET NULL"))
    job_id: Mapped[int | None] = mapped_column(Integer)
    # The record position of the settings change this version was trained
    # under (0: the settings it was created with; None: made before settings
    # could change). The change itself is in the model's history.
    settings_from_seq: Mapped[int | None] = mapped_column(BigInteger)
    created_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    promoted_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    pruned_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))


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


# ---------------------------------------------------------------------------
# Scored cases: keyed predictions waiting for their outcomes.


class ScoredCaseRow(Base):
    """A keyed prediction kept until its outcome arrives: what was scored, by
    which version, what it answered; then what happened.

    ``features`` are the validated features as records store them, so an
    outcome turns the case into a record without the client sending them
    again. ``rescored`` counts the same key sent again with the same features
    (the first score is kept: it is the one that was acted on).
    """

    __tablename__ = "scored_cases"
    __table_args__ = (
        UniqueConstraint("model_id", "key"),
        # Retention: the oldest unresolved cases of a model, found by index.
        Index("ix_scored_cases_unresolved", "model_id", "outcome_at", "scored_at"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    key: Mapped[str] = mapped_column(String(200))
    features: Mapped[dict[str, Any]]
    version_id: Mapped[int | None] = mapped_column(ForeignKey("versions.id", ondelete="SET NULL"))
    output: Mapped[Any] = mapped_column(LabelJSON)
    scored_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    rescored: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    outcome: Mapped[Any | None] = mapped_column(LabelJSON, nullable=True)
    outcome_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))


# ---------------------------------------------------------------------------
# Live metrics (the track record): sums of served scores against their
# outcomes per model, version and UTC day of the outcome, and the change alarm
# per model and version. Kept by service.usecases.track_record as outcomes
# arrive, under the model row lock the outcome batch holds.

# Float64 sums: DOUBLE PRECISION on PostgreSQL, REAL (8 bytes) on SQLite.
Sum: Double[float] = Double()


class TrackRecordDayRow(Base):
    """engine.track_record.Tally of one version's outcomes on one UTC day."""

    __tablename__ = "track_record_days"
    __table_args__ = (
        UniqueConstraint("model_id", "version_id", "day"),
        # The summary reads a model's rows in a window of days.
        Index("ix_track_record_days_model_id_day", "model_id", "day"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    version_id: Mapped[int] = mapped_column(ForeignKey("versions.id", ondelete="CASCADE"))
    day: Mapped[dt.date] = mapped_column(Date)
    n: Mapped[int] = mapped_column(BigInteger)
    correct: Mapped[int] = mapped_column(BigInteger)
    log_loss_sum: Mapped[float] = mapped_column(Sum)
    brier_sum: Mapped[float] = mapped_column(Sum)
    abs_sum: Mapped[float] = mapped_column(Sum)
    sq_sum: Mapped[float] = mapped_column(Sum)
    y_mean: Mapped[float] = mapped_column(Sum)
    y_m2: Mapped[float] = mapped_column(Sum)
    # [count, sum predicted, sum observed], each a list of 10 bins.
    calibration: Mapped[list[Any]]
    # Binary only: the (2, AUC_BINS) int64 histogram, little-endian, zlib-compressed.
    auc_histogram: Mapped[bytes | None] = mapped_column(LargeBinary)


class TrackRecordAlarmRow(Base):
    """engine.track_record.AlarmState of one version; raised_at is the time of
    the outcome that raised it (latched)."""

    __tablename__ = "track_record_alarms"

    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True)
    version_id: Mapped[int] = mapped_column(
        ForeignKey("versions.id", ondelete="CASCADE"), primary_key=True)
    n: Mapped[int] = mapped_column(BigInteger)
    mean: Mapped[float] = mapped_column(Sum)
    cumulative: Mapped[float] = mapped_column(Sum)
    minimum: Mapped[float] = mapped_column(Sum)
    error_sum: Mapped[float] = mapped_column(Sum)
    raised_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    updated_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)


# ---------------------------------------------------------------------------
# Drift: per-process counts of predictions' fields over reference bins.


class DriftTallyRow(Base):
    """How many predictions one API process saw in each of a field's reference
    bins, for one model's active version, in one hour (``bucket_start``).

    ``writer`` names the process (random per process start): only that
    process writes its rows, and each flush writes its running totals for the
    hour whole, so processes never contend for a row and a repeated flush
    changes nothing. ``counts``: every field's counts over the version's
    reference bins (engine/drift_bins.py), fields in the spec's order, as
    little-endian int64 (the answer adds a week of rows from 8 processes in
    one NumPy call; as JSON, parsing them took most of its 50 ms)."""

    __tablename__ = "drift_tallies"
    __table_args__ = (
        UniqueConstraint("model_id", "version_id", "bucket_start", "writer"),
        # Retention deletes the hours older than KEELSON_DRIFT_TALLY_RETENTION_DAYS.
        Index("ix_drift_tallies_bucket_start", "bucket_start"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    version_id: Mapped[int] = mapped_column(ForeignKey("versions.id", ondelete="CASCADE"))
    bucket_start: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    writer: Mapped[str] = mapped_column(String(64))
    predictions: Mapped[int] = mapped_column(BigInteger)
    counts: Mapped[bytes] = mapped_column(LargeBinary)
    updated_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
