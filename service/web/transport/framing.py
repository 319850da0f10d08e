"""Where one HTTP/1.1 request ends in the bytes received so far (RFC 9112 section 6).

The transport reads each request whole before a thread handles it; this scan
finds the end of the head and of the body without interpreting anything else.
It decides *when* a request is complete, never what it means: gunicorn's
parser reads the same bytes afterwards, frames them itself and refuses what is
malformed. A head this scan cannot frame with certainty (two lengths, a
transfer coding other than a final ``chunked``) is handed over as soon as it
is read, so that parser answers it with a 400; a chunked body that breaks its
own framing is refused here. The
parser never reads the socket (service.web.transport.connection), so a
disagreement can only end a connection, never stall a thread.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

from service.web.body_limit import body_limit_detail

_HEX = frozenset(b"0123456789abcdefABCDEF")
# A chunk-size line is a few hex digits and optional extensions.
MAX_CHUNK_LINE = 4096


class Progress(enum.Enum):
    HEAD = "head"  # the head is not complete yet
    BODY = "body"  # the head is complete, the body is not
    READY = "ready"  # a whole request (or a head to hand over as it is) is held


@dataclass(frozen=True)
class Refusal:
    """The request is answered by the transport itself: ``status`` with ``detail``."""

    status: int
    detail: str


class RequestFraming:
    """Incremental scan of one request; ``scan`` is called with everything
    received so far for it (the same buffer, growing) until it answers READY
    or a Refusal. Each byte is looked at about once, however the request is
    cut into reads."""

    __slots__ = ("_chunk_left", "_chunked", "_max_body", "_max_head", "_max_line", "_pos",
                 "_searched", "_trailer_start", "body_bytes", "expects_continue", "head_end")

    def __init__(self, max_head: int, max_line: int, max_body: int) -> None:
        self._max_head, self._max_line, self._max_body = max_head, max_line, max_body
        self.head_end = -1  # offset just past the head's blank line, once found
        self.body_bytes = 0  # body bytes announced so far (Content-Length or chunk sizes)
        self.expects_continue = False
        self._searched = 0  # the head's terminator is not before this offset
        self._chunked = False
        self._pos = 0  # chunked: where the next unscanned chunk part starts
        self._chunk_left: int | None = None  # chunked: chunk data (and CRLF) still to come
        self._trailer_start = -1  # chunked: where the trailer section starts, once reached

    def scan(self, data: bytes | bytearray) -> Progress | Refusal:
        if self.head_end < 0:
            found = self._scan_head(data)
            if found is not None:
                return found
        if self._chunked:
            return self._scan_chunks(data)
        return Progress.READY if len(data) >= self.head_end + self.body_bytes else Progress.BODY

    def _scan_head(self, data: bytes | bytearray) -> Progress | Refusal | None:
        end = data.find(b"\r\n\r\n", self._searched, self._max_head)
        if end < 0 and data.find(b"\n\n", 0, self._max_head) >= 0:
            self.head_end = len(data)
            return Progress.READY  # lines end in bare LF: the parser refuses it now
        if end < 0:
            self._searched = max(0, len(data) - 3)
            if len(data) > self._max_line + 1 and data.find(b"\r\n", 0, self._max_line + 2) < 0:
                return Refusal(414, f"The request line is longer than {self._max_line} bytes.")
            if len(data) >= self._max_head:
                return Refusal(431, f"The request head is larger than {self._max_head} bytes.")
            return Progress.HEAD
        self.head_end = end + 4
        head = bytes(data[:end]).lower()
        if b"content-length" not in head and b"transfer-encoding" not in head:
            return Progress.READY  # no body (RFC 9112 section 6.3, last rule for requests)
        lengths: list[bytes] = []
        codings: list[bytes] = []
        expect = b""
        lines = head.split(b"\r\n")
        for line in lines[1:]:
            name, _, value = line.partition(b":")
            if name == b"content-length":
                lengths.append(value.strip(b" \t"))
            elif name == b"transfer-encoding":
                codings.extend(c.strip(b" \t") for c in value.split(b","))
            elif name == b"expect":
                expect = value.strip(b" \t")
        http11 = lines[0].endswith(b" http/1.1")
        if codings:
            # Only a single, final chunked coding frames a request (RFC 9112
            # section 6.3); anything else is the parser's to refuse.
            if lengths or codings[-1] != b"chunked" or codings.count(b"chunked") != 1 \
                    or not http11:
                return Progress.READY
            self._chunked, self._pos = True, self.head_end
        elif len(lengths) == 1 and lengths[0].isdigit():
            self.body_bytes = int(lengths[0])
            if self.body_bytes > self._max_body:
                return Refusal(413, body_limit_detail(self._max_body))
        else:
            return Progress.READY  # repeated or unreadable length: the parser refuses it
        self.expects_continue = http11 and expect == b"100-continue"
        return None

    def _scan_chunks(self, data: bytes | bytearray) -> Progress | Refusal:
        size = len(data)
        while True:
            if self._chunk_left is not None:  # chunk data, then its CRLF
                after = self._pos + self._chunk_left + 2
                if size < after:
                    return Progress.BODY
                if data[after - 2:after] != b"\r\n":
                    return Refusal(400, "A chunk's data does not end where its size says "
                                        "(RFC 9112 section 7.1).")
                self._pos, self._chunk_left = after, None
                continue
            eol = data.find(b"\r\n", self._pos)
            if self._trailer_start >= 0:
                if (eol if eol >= 0 else size) - self._trailer_start > self._max_head:
                    return Refusal(431, "The trailer section is larger than "
                                        f"{self._max_head} bytes.")
                if eol < 0:
                    return Progress.BODY
                blank = eol == self._pos
                self._pos = eol + 2
                if blank:
                    return Progress.READY  # the blank line that ends the trailer section
                continue
            if eol < 0 or eol - self._pos > MAX_CHUNK_LINE:
                if (eol if eol >= 0 else size) - self._pos > MAX_CHUNK_LINE:
                    return Refusal(400, "A chunk-size line is longer than "
                                        f"{MAX_CHUNK_LINE} bytes.")
                return Progress.BODY
            digits, semicolon, _ = bytes(data[self._pos:eol]).partition(b";")
            self._pos = eol + 2
            if semicolon:
                digits = digits.rstrip(b" \t")
            if not digits or not _HEX.issuperset(digits):
                return Refusal(400, "A chunk size is not a hexadecimal number "
                                    "(RFC 9112 section 7.1).")
            chunk = int(digits, 16)
            if chunk == 0:
                self._trailer_start = self._pos
                continue
            self.body_bytes += chunk
            if self.body_bytes > self._max_body:
                return Refusal(413, body_limit_detail(self._max_body))
            self._chunk_left = chunk
