"""The transport's limits: how long and how much a client may take."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class TransportLimits:
    """How long and how much a client may take (service.web.server sets them)."""

    header_timeout: float = 10.0  # from a request's first byte (or the accept) to its blank line
    body_timeout: float = 60.0  # from the end of the head to the end of the body
    send_timeout: float = 30.0  # for the client to take an answer the kernel could not hold
    max_head_bytes: int = 32 * 1024
    max_body_bytes: int = 16 * 1024 * 1024

    @property
    def buffer_budget(self) -> int:
        """Body bytes a worker holds for requests still arriving; beyond it,
        bodies wait in the kernel (TCP flow control) until requests leave."""
        return 4 * self.max_body_bytes
