"""The one way a request body is read: within ``KEELSON_MAX_BODY_BYTES``,
whatever its framing.

``BoundedRequest`` is the app's request class, so every reader of a body
(webargs' JSON loader, the CSV and JSON ingest views, form parsing) goes
through ``BoundedBody``. A body declared (Content-Length) or found (chunked)
to be larger than the limit is a 413 before anything is parsed, so nothing is
stored. werkzeug's own stream stops silently at the limit when the server
frames a chunked body (``wsgi.input_terminated``): an over-long CSV lost its
last rows and was stored as the shorter file.

Under ``keelson serve`` the transport already refuses such bodies before the
app runs (service.web.transport.framing); this holds for any other server and
for in-process clients.
"""

from __future__ import annotations

import io
from typing import IO, Any

from flask import Request
from werkzeug.exceptions import ClientDisconnected
from werkzeug.utils import cached_property

from service.errors import KeelsonError, MalformedError, TooLargeError


class LengthRequiredError(KeelsonError):
    status = 411


def body_limit_detail(limit: int) -> str:
    """The one wording of the body limit, whoever enforces it."""
    return f"The request body is larger than the limit of {limit} bytes; nothing was stored."


class BoundedBody(io.RawIOBase):
    """A request body read through a limit: more than ``limit`` bytes raise
    TooLargeError (413); a body shorter than its declared ``length`` raises
    ClientDisconnected (400), one the server cannot read (broken chunks)
    MalformedError (400). Never reads past ``length``, nor more than one byte
    past ``limit``."""

    def __init__(self, source: Any, limit: int | None, length: int | None) -> None:
        super().__init__()
        self._source, self._limit, self._left = source, limit, length
        self._seen = 0

    def readable(self) -> bool:
        return True

    def read(self, size: int | None = -1) -> bytes:
        if size is None or size < 0:
            return self.readall()
        want = size if self._left is None else min(size, self._left)
        if self._limit is not None:
            want = min(want, self._limit + 1 - self._seen)
        if want <= 0:
            return b""
        try:
            data: bytes = self._source.read(want)
        except Exception as error:  # the server's reader found the framing broken
            raise MalformedError("The request body cannot be read: its framing is "
                                 "broken.") from error
        if self._left is not None:
            if not data:
                raise ClientDisconnected()
            self._left -= len(data)
        self._seen += len(data)
        if self._limit is not None and self._seen > self._limit:
            raise TooLargeError(body_limit_detail(self._limit))
        return data

    def readall(self) -> bytes:
        parts: list[bytes] = []
        while True:
            # One read of everything still allowed: the source returns what it has.
            allowed = (self._left if self._left is not None
                       else (self._limit + 1 - self._seen if self._limit is not None
                             else 1 << 20))
            data = self.read(max(allowed, 1))
            if not data:
                return b"".join(parts)
            parts.append(data)

    def readinto(self, buffer: Any) -> int:
        data = self.read(len(buffer))
        buffer[: len(data)] = data
        return len(data)


class BoundedRequest(Request):
    """Flask's request, its body read through ``BoundedBody``."""

    @cached_property
    def stream(self) -> IO[bytes]:
        limit = self.max_content_length
        length = self.content_length
        if limit is not None and length is not None and length > limit:
            raise TooLargeError(body_limit_detail(limit))
        if length is None and not self.environ.get("wsgi.input_terminated"):
            if "chunked" in self.environ.get("HTTP_TRANSFER_ENCODING", "").lower():
                # The server cannot say where this body ends: refuse it rather
                # than read it as empty (RFC 9110 section 15.5.12).
                raise LengthRequiredError("Send the body with a Content-Length.")
            return io.BytesIO(b"")
        return BoundedBody(self.environ["wsgi.input"], limit, length)  # type: ignore[return-value]
