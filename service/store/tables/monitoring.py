"""The tables of the operations loop: scored cases, live metrics and drift tallies."""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import (
    BigInteger,
    Date,
    DateTime,
    Double,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column

from service.store.tables.base import Base, BigId, LabelJSON, utcnow

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
    __table_args__ = (UniqueConstraint("model_id", "version_id", "bucket_start", "writer"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    version_id: Mapped[int] = mapped_column(ForeignKey("versions.id", ondelete="CASCADE"))
    bucket_start: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    writer: Mapped[str] = mapped_column(String(64))
    predictions: Mapped[int] = mapped_column(BigInteger)
    counts: Mapped[bytes] = mapped_column(LargeBinary)
    updated_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)


