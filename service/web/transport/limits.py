"""The transport's limits: how long and how much a client may take."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class TransportLimits:
    """Read from the settings registry (service/config.py), where each has its
    meaning and default."""

    header_timeout: float  # from a request's first byte (or the accept) to its blank line
    body_timeout: float  # from the end of the head to the end of the body
    send_timeout: float  # for the client to take an answer the kernel could not hold
    max_head_bytes: int
    max_body_bytes: int

    @classmethod
    def from_settings(cls, read: Callable[[str], Any]) -> TransportLimits:
        """``read``: a setting's value by name (service.config.read_setting)."""
        return cls(header_timeout=read("KEELSON_HEADER_TIMEOUT"),
                   body_timeout=read("KEELSON_BODY_TIMEOUT"),
                   send_timeout=read("KEELSON_SEND_TIMEOUT"),
                   max_head_bytes=read("KEELSON_MAX_HEAD_BYTES"),
                   max_body_bytes=read("KEELSON_MAX_BODY_BYTES"))

    @property
    def buffer_budget(self) -> int:
        """Body bytes a worker holds for requests still arriving; beyond it,
        bodies wait in the kernel (TCP flow control) until requests leave."""
        return 4 * self.max_body_bytes
