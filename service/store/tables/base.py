"""What every table shares: the declarative base with its naming rule, and the
column types that differ between SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Integer,
    MetaData,
    Text,
    TypeDecorator,
)
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase

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


