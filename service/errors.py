"""Errors the use cases raise on purpose, independent of HTTP.

The API turns each into a problem details answer (service.web.problems); the
command line prints them. ``errors`` maps field paths (``records.3.features.x``)
to lists of messages.
"""

from __future__ import annotations


class KeelsonError(Exception):
    """Base of every error a use case raises on purpose."""

    status = 400

    def __init__(
        self,
        detail: str,
        errors: dict[str, list[str]] | None = None,
        headers: dict[str, str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = errors
        self.headers = headers


class UnauthorizedError(KeelsonError):
    status = 401


class ForbiddenError(KeelsonError):
    status = 403


class NotFoundError(KeelsonError):
    status = 404


class ConflictError(KeelsonError):
    status = 409


class InvalidInputError(KeelsonError):
    """The request is well-formed but its content breaks a rule (422)."""

    status = 422


class TooLargeError(KeelsonError):
    status = 413


class MalformedError(KeelsonError):
    """The body cannot be parsed at all (broken JSON or CSV): 400."""

    status = 400


class UnsupportedMediaError(KeelsonError):
    status = 415
