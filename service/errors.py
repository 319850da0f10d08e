"""Errors the use cases raise on purpose, independent of HTTP.

The API turns each into a problem details answer (service.web.problems); the
command line prints them. ``errors`` maps field paths (``records.3.features.x``)
to lists of messages.
"""

from __future__ import annotations

from typing import Any


class KeelsonError(Exception):
    """Base of every error a use case raises on purpose.

    ``problem_type`` names a kind of problem a client may act on (RFC 9457
    ``type``); ``members`` are extra members of the answer (RFC 9457 section
    3.2), such as the figures a refusal was decided on."""

    status = 400
    problem_type: str | None = None
    title: str | None = None  # for a status without a standard phrase

    def __init__(
        self,
        detail: str,
        errors: dict[str, list[str]] | None = None,
        headers: dict[str, str] | None = None,
        members: dict[str, Any] | None = None,
    ) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = errors
        self.headers = headers
        self.members = members


class UnauthorizedError(KeelsonError):
    status = 401


class ForbiddenError(KeelsonError):
    status = 403


class NotFoundError(KeelsonError):
    status = 404


class NotAcceptableError(KeelsonError):
    """No representation the client accepts (RFC 9110 section 15.5.7): 406."""

    status = 406


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
