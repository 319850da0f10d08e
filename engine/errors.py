"""The engine's exceptions: one base class, one subclass per way things go wrong."""

from __future__ import annotations


class EngineError(Exception):
    """Base of every error the engine raises on purpose."""


class InvalidInputError(EngineError, ValueError):
    """Bad input: wrong shape, NaN/inf, unknown field or level, bad label or spec.

    `field` names the offending field (or spec key) when it is known.
    """

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


class NonFiniteError(EngineError, ArithmeticError):
    """A step would make the loss or a weight NaN or infinite; nothing was changed.

    `applied` counts the records applied before the offending one (0 for a single step).
    """

    def __init__(self, message: str, applied: int = 0) -> None:
        super().__init__(message)
        self.applied = applied


class SnapshotError(EngineError):
    """Snapshot bytes are corrupt, truncated or from an incompatible format."""


class TrainingCancelled(EngineError):
    """The batch trainer's cancel hook asked it to stop."""
