"""Use cases for bearer tokens: create (shown once), list, revoke.

A token may be limited to models (``models``): it then reaches those models
and nothing else (service/web/auth.py enforces it). Only the SHA-256 hash of
a token is stored; the plaintext exists in the return value of
``create_token`` and nowhere else. Each function runs in its own transaction
on the database it is given.
"""

from __future__ import annotations

import hashlib
import secrets
from collections.abc import Iterable

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.errors import InvalidInputError, NotFoundError
from service.store.database import Database, transaction
from service.store.tables import ModelRow, TokenRow, utcnow
from service.text import NOT_SCALAR_TEXT, is_scalar_text
from service.usecases.common import is_model_name

SCOPES = ("ingest", "predict", "admin")  # admin implies the others
TOKEN_BYTES = 32  # 256 bits of randomness: guessing is not an attack
MAX_NAME_LENGTH = 100


def hash_token(plaintext: str) -> str:
    """What is stored of a token: its SHA-256, hex."""
    return hashlib.sha256(plaintext.encode("utf-8")).hexdigest()


def create_token(
    db: Database, name: str, scopes: Iterable[str], models: Iterable[str] | None = None,
) -> tuple[TokenRow, str]:
    """Store a new token with ``scopes``, limited to ``models`` when given (None:
    every model); returns its row and the plaintext. Each limiting model must
    exist: a token limited to a mistyped name would reach nothing."""
    wanted = sorted(set(scopes))
    limited = None if models is None else sorted(set(models))
    errors: dict[str, list[str]] = {}
    if not name or len(name) > MAX_NAME_LENGTH:
        errors["name"] = [f"A name of 1 to {MAX_NAME_LENGTH} characters is required."]
    elif not is_scalar_text(name):
        errors["name"] = [NOT_SCALAR_TEXT]
    if not wanted:
        errors["scopes"] = ["At least one scope is required."]
    unknown = [s for s in wanted if s not in SCOPES]
    if unknown:
        errors["scopes"] = [f"Unknown scope {s!r}; choose from {', '.join(SCOPES)}."
                            for s in unknown]
    plaintext = secrets.token_urlsafe(TOKEN_BYTES)
    row = TokenRow(name=name, token_hash=hash_token(plaintext), scopes=wanted, models=limited)
    with transaction(db.write) as session:
        if limited is not None:
            missing = _missing_models(session, limited)
            if missing or not limited:
                errors["models"] = [f"There is no model named {m!r}." for m in missing] or [
                    "A limited token needs at least one model."]
        if errors:
            raise InvalidInputError("The token request is invalid.", errors=errors)
        session.add(row)
    return row, plaintext


def _missing_models(session: Session, names: list[str]) -> list[str]:
    valid = [n for n in names if is_model_name(n)]
    found = set(session.scalars(select(ModelRow.name).where(ModelRow.name.in_(valid))))
    return [n for n in names if n not in found]


def list_tokens(db: Database) -> list[TokenRow]:
    """Every token, revoked ones included, oldest first."""
    with db.read() as session:
        return list(session.scalars(select(TokenRow).order_by(TokenRow.id)))


def revoke_token(db: Database, id_or_name: int | str) -> list[TokenRow]:
    """Revoke the token with this id, or every live token with this name.

    Returns the revoked rows; raises NotFoundError when nothing matched.
    """
    query = select(TokenRow).where(TokenRow.revoked_at.is_(None))
    if isinstance(id_or_name, int) or (id_or_name.isascii() and id_or_name.isdigit()):
        query = query.where(TokenRow.id == int(id_or_name))
    elif is_scalar_text(id_or_name):
        query = query.where(TokenRow.name == id_or_name)
    else:  # no stored name is such text (create_token refuses it)
        raise NotFoundError(f"No live token matches {id_or_name!r}.")
    with transaction(db.write) as session:
        rows = list(session.scalars(query))
        if not rows:
            raise NotFoundError(f"No live token matches {id_or_name!r}.")
        now = utcnow()
        for row in rows:
            row.revoked_at = now
    return rows
