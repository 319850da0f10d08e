"""One client connection as the buffering worker holds it.

The socket stays non-blocking for its whole life. The event loop reads each
request into ``inbox``; a request thread then parses it from ``HeldBytes``
(which never touches the socket) and writes its answer through
``OwedWrites`` (which never waits for the socket: what the kernel cannot take
at once is kept in ``owed`` and sent by the event loop). So a client that
sends slowly, stops half-way or reads its answer slowly costs a buffer and a
file descriptor, never a thread.
"""

from __future__ import annotations

import contextlib
import enum
import socket
from typing import Any

from gunicorn.http.parser import RequestParser
from gunicorn.http.unreader import Unreader
from gunicorn.workers.gthread import TConn

from service.web.transport.framing import RequestFraming


class HeldBytes(Unreader):  # type: ignore[misc]  # gunicorn ships no types
    """gunicorn's parser source: the bytes the event loop read, and nothing
    more. Reading past them is the end of the input, not a wait."""

    def chunk(self, size_hint: int | None = None) -> bytes:
        return b""

    def feed(self, data: bytes | bytearray) -> None:
        self.buf.seek(0, 2)
        self.buf.write(data)


class OwedWrites:
    """The socket as a request thread sees it: ``sendall`` sends what the
    kernel takes now and keeps the rest in ``owed`` for the event loop;
    blocking-mode changes are ignored (the socket stays non-blocking)."""

    def __init__(self, sock: socket.socket) -> None:
        self._sock = sock
        self.owed = bytearray()

    def sendall(self, data: bytes | bytearray | memoryview) -> None:
        if not self.owed:
            try:
                sent = self._sock.send(data)
            except (BlockingIOError, InterruptedError):
                sent = 0
            if sent == len(data):
                return
            data = memoryview(data)[sent:]
        self.owed += data

    def send(self, data: bytes | bytearray | memoryview) -> int:
        self.sendall(data)
        return len(data)

    def flush(self) -> bool:
        """Send what the kernel takes now (event loop); True once nothing is owed."""
        while self.owed:
            try:
                sent = self._sock.send(self.owed)
            except (BlockingIOError, InterruptedError):
                return False
            del self.owed[:sent]
        return True

    def setblocking(self, flag: bool) -> None:
        pass

    def settimeout(self, value: float | None) -> None:
        pass

    def gettimeout(self) -> float:
        return 0.0

    def __getattr__(self, name: str) -> Any:
        return getattr(self._sock, name)


class Stage(enum.Enum):
    IDLE = "idle"  # waiting for the first byte of a request
    HEAD = "head"  # reading a request head
    BODY = "body"  # reading a request body
    PAUSED = "paused"  # a body waits for buffer room (the worker's budget is spent)
    BUSY = "busy"  # a request thread has it
    WRITING = "writing"  # the answer is still being sent
    CLOSING = "closing"  # answered and half-closed; discarding what the client still sends
    CLOSED = "closed"


class Connection(TConn):  # type: ignore[misc]
    """gunicorn's connection record, read and written by the event loop."""

    def __init__(self, cfg: Any, sock: socket.socket, client: Any, server: Any) -> None:
        super().__init__(cfg, sock, client, server)  # makes the socket non-blocking
        self.raw = sock
        self.sock = OwedWrites(sock)
        self.parser = RequestParser(cfg, (), client)
        self.parser.unreader = HeldBytes()
        self.initialized = True  # nothing for a request thread to set up
        self.stage = Stage.IDLE
        self.deadline = 0.0
        self.keep_alive = False  # after WRITING: read the next request, or close
        self.served = 0
        self.inbox = bytearray()
        self.framing: RequestFraming | None = None
        self.continue_sent = False
        self.discarded = 0
        self.watched = 0  # the selector events registered for it (0: none)
        self.on_event: Any = None  # the selector's callback for it, made once

    def next_request(self, framing: RequestFraming) -> None:
        """Start reading the next request, from what was read ahead of it."""
        self.inbox = bytearray(self.parser.unreader.take_buffered())
        self.framing = framing
        self.continue_sent = False

    def close(self, graceful: bool = False) -> None:
        with contextlib.suppress(OSError):
            self.raw.close()
