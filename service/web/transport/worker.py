"""The API's gunicorn worker: gthread, with each request read whole before a thread sees it.

gunicorn's gthread worker hands a connection to a pool thread as soon as it
has bytes, and the thread then reads the request with blocking calls: a
client that sends part of a head and waits holds a thread for as long as it
likes, and a handful of them stop a worker (docs/transport.md). Here the
worker's event loop (the same selector gthread accepts and parks keep-alive
connections with) reads every request, head and body, with non-blocking
calls, within time limits, up to the size limits; only a complete request
goes to a thread, which parses it from memory and writes its answer without
waiting for the client (service.web.transport.connection). Too slow, too
large or unparsable requests are answered by the transport itself with
problem details (service.web.transport.answers).
"""

from __future__ import annotations

import errno
import functools
import selectors
import socket
import time
from collections import deque
from concurrent.futures import Future
from typing import Any, ClassVar

from gunicorn.workers.gthread import STOP_KEEPALIVE_LINGER, ThreadWorker

from service.config import read_setting
from service.web.observability import request_id_for, transport_refusals
from service.web.transport.answers import (
    DETAILS,
    answer_parse_error,
    client_address,
    problem_answer,
)
from service.web.transport.connection import Connection, Stage
from service.web.transport.framing import Progress, Refusal, RequestFraming
from service.web.transport.limits import TransportLimits

CONTINUE = b"HTTP/1.1 100 Continue\r\n\r\n"
# After an answer that closes the connection, what the client still sends is
# read and dropped this long, so closing does not reset the connection before
# the client has read the answer (RFC 9112 section 9.6).
LINGER_SECONDS = 5.0
EXPIRY_EVERY = 0.25  # how often deadlines are checked, seconds
HEAD_READ = 64 * 1024
BODY_READ = 1024 * 1024


class BufferingWorker(ThreadWorker):  # type: ignore[misc]  # gunicorn ships no types
    # Set by ``configured`` (service.web.server); else read when a process starts.
    configured_limits: ClassVar[TransportLimits | None] = None

    @classmethod
    def configured(cls, limits: TransportLimits) -> type[BufferingWorker]:
        """This worker class with ``limits`` (gunicorn takes a class as ``worker_class``)."""
        return type(cls.__name__, (cls,), {"configured_limits": limits})

    @classmethod
    def check_config(cls, cfg: Any, log: Any) -> None:
        super().check_config(cfg, log)
        if cfg.is_ssl or getattr(cfg, "http2_cleartext", "off") != "off":
            raise RuntimeError("Keelson's API worker serves plain HTTP/1.1: terminate TLS and "
                               "HTTP/2 in a proxy in front of it (docs/transport.md)")

    def init_process(self) -> None:
        self.limits = self.configured_limits or TransportLimits.from_settings(read_setting)
        # gunicorn's settings, read once: each read is a lookup through its
        # Config object, and these are needed for every request.
        line = self.cfg.limit_request_line
        self.max_line = line if 0 < line <= 8190 else 8190
        self.keepalive_seconds = float(self.cfg.keepalive)
        self.owned: set[Connection] = set()  # connections the event loop holds (not a thread)
        self.paused: deque[Connection] = deque()
        self.buffered = 0  # bytes in the inboxes of owned connections
        self.next_expiry = 0.0
        super().init_process()

    # --- connections in, requests out -------------------------------------

    def accept(self, listener: socket.socket) -> None:
        try:
            sock, client = listener.accept()
        except OSError as error:
            if error.errno not in (errno.EAGAIN, errno.ECONNABORTED, errno.EWOULDBLOCK):
                raise
            return
        self.nr_conns += 1
        conn = Connection(self.cfg, sock, client, listener.getsockname())
        conn.on_event = functools.partial(self.on_event, conn)
        conn.deadline = time.monotonic() + self.limits.header_timeout
        self.read_next(conn)

    def read_next(self, conn: Connection) -> None:
        """Wait for the connection's next request (its first, or after an answer)."""
        limits = self.limits
        conn.next_request(RequestFraming(limits.max_head_bytes, self.max_line,
                                         limits.max_body_bytes))
        self.owned.add(conn)
        now = time.monotonic()
        if conn.served:
            conn.deadline = now + self.keepalive_seconds
            if not self.alive:
                conn.deadline = min(conn.deadline, now + STOP_KEEPALIVE_LINGER)
        if conn.inbox:  # the client sent it already, behind the last one
            conn.stage = Stage.HEAD
            conn.deadline = now + limits.header_timeout
            self.buffered += len(conn.inbox)
            self.frame(conn)
        else:
            conn.stage = Stage.IDLE
            self.watch(conn, selectors.EVENT_READ)

    def on_event(self, conn: Connection, _fileobj: Any) -> None:
        if conn.stage is Stage.WRITING:
            self.flush(conn)
            return
        try:
            data = conn.raw.recv(BODY_READ if conn.stage is Stage.BODY else HEAD_READ)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            self.drop(conn)
            return
        if not data:  # the client closed its side
            self.drop(conn)
            return
        if conn.stage is Stage.CLOSING:
            return  # dropped: the answer is sent, the request is not wanted
        if conn.stage is Stage.IDLE:
            conn.stage = Stage.HEAD
            if conn.served:
                conn.deadline = time.monotonic() + self.limits.header_timeout
        conn.inbox += data
        self.buffered += len(data)
        self.frame(conn)

    def frame(self, conn: Connection) -> None:
        assert conn.framing is not None
        progress = conn.framing.scan(conn.inbox)
        if isinstance(progress, Refusal):
            self.refuse(conn, progress.status, progress.detail)
        elif progress is Progress.READY:
            self.dispatch(conn)
        elif progress is Progress.BODY:
            if conn.stage is Stage.HEAD:
                conn.stage = Stage.BODY
                conn.deadline = time.monotonic() + self.limits.body_timeout
                if conn.framing.expects_continue and len(conn.inbox) == conn.framing.head_end:
                    self.send_continue(conn)
            if self.buffered > self.limits.buffer_budget:
                conn.stage = Stage.PAUSED
                self.unwatch(conn)
                self.paused.append(conn)
            else:
                self.watch(conn, selectors.EVENT_READ)
        else:
            self.watch(conn, selectors.EVENT_READ)

    def send_continue(self, conn: Connection) -> None:
        """RFC 9110 section 10.1.1: the client waits for this before its body."""
        try:
            conn.raw.send(CONTINUE)
        except OSError:
            self.drop(conn)
        conn.continue_sent = True

    def dispatch(self, conn: Connection) -> None:
        self.unwatch(conn)
        self.owned.discard(conn)
        self.buffered -= len(conn.inbox)
        conn.parser.unreader.feed(conn.inbox)
        conn.inbox = bytearray()
        conn.stage = Stage.BUSY
        conn.served += 1
        self.enqueue_req(conn)
        self.resume_paused()

    def handle_request(self, req: Any, conn: Connection) -> bool:
        # The body is here already: no 100 Continue from the thread.
        req._expected_100_continue = False
        return bool(super().handle_request(req, conn))

    def _keepalive_after(self, conn: Connection, keepalive: bool) -> bool:
        # What the app left of the body is in memory: drop it and keep the connection.
        return bool(keepalive and conn.parser.finish_body())

    def finish_request(self, conn: Connection, fs: Future[Any]) -> None:
        """A thread is done with the connection (run on the event loop)."""
        try:
            keep_alive = not fs.cancelled() and bool(fs.result())
        except Exception:
            keep_alive = False
        self.answered(conn, keep_alive)

    def answered(self, conn: Connection, keep_alive: bool) -> None:
        conn.keep_alive = keep_alive
        self.owned.add(conn)
        if conn.sock.owed:
            conn.stage = Stage.WRITING
            conn.deadline = time.monotonic() + self.limits.send_timeout
            self.watch(conn, selectors.EVENT_WRITE)
        elif keep_alive:
            self.read_next(conn)
        else:
            self.close_gently(conn)

    def flush(self, conn: Connection) -> None:
        try:
            done = conn.sock.flush()
        except OSError:
            self.drop(conn)
            return
        if done:
            self.answered(conn, conn.keep_alive)

    # --- endings --------------------------------------------------------------

    def refuse(self, conn: Connection, status: int, detail: str) -> None:
        """Answer the request being read with ``status`` and close the connection."""
        self.log.warning("refused a request from %s: %s (%s)", client_address(conn.client),
                         status, conn.stage.value)
        transport_refusals().labels(str(status)).inc()
        self.release(conn)
        try:
            conn.sock.sendall(problem_answer(status, detail, request_id_for(None)))
        except OSError:
            self.drop(conn)
            return
        self.answered(conn, False)

    def close_gently(self, conn: Connection) -> None:
        try:
            conn.raw.shutdown(socket.SHUT_WR)
        except OSError:
            self.drop(conn)
            return
        self.release(conn)
        conn.stage = Stage.CLOSING
        conn.deadline = time.monotonic() + LINGER_SECONDS
        self.watch(conn, selectors.EVENT_READ)

    def drop(self, conn: Connection) -> None:
        if conn.stage is Stage.CLOSED:
            return
        self.unwatch(conn)
        self.owned.discard(conn)
        self.release(conn)
        conn.stage = Stage.CLOSED
        self.nr_conns -= 1
        conn.close()

    def release(self, conn: Connection) -> None:
        """Give back the buffer budget of what the connection holds."""
        self.buffered -= len(conn.inbox)
        conn.inbox = bytearray()
        self.resume_paused()

    def resume_paused(self) -> None:
        while self.paused and self.buffered <= self.limits.buffer_budget:
            conn = self.paused.popleft()
            if conn.stage is Stage.PAUSED:
                conn.stage = Stage.BODY
                self.watch(conn, selectors.EVENT_READ)

    def murder_pending(self) -> None:
        """Called by gthread's loop after every wait: end what overstayed."""
        now = time.monotonic()
        if now < self.next_expiry:
            return
        self.next_expiry = now + EXPIRY_EVERY
        for conn in [c for c in self.owned if c.deadline <= now]:
            if conn.stage in (Stage.HEAD, Stage.BODY, Stage.PAUSED) and conn.inbox:
                self.refuse(conn, 408, DETAILS[408])
            else:  # idle, or an answer the client does not read, or a linger done
                self.drop(conn)

    def murder_keepalived(self, force: bool = False) -> None:
        if force:
            for conn in list(self.owned):
                self.drop(conn)

    def _cap_keepalive(self, deadline: float) -> None:
        for conn in self.owned:
            if conn.stage is Stage.IDLE:
                conn.deadline = min(conn.deadline, deadline)

    # --- the selector -----------------------------------------------------------

    def watch(self, conn: Connection, events: int) -> None:
        if conn.watched == events:
            return
        if conn.watched:
            self.poller.modify(conn.raw, events, conn.on_event)
        else:
            self.poller.register(conn.raw, events, conn.on_event)
        conn.watched = events

    def unwatch(self, conn: Connection) -> None:
        if conn.watched:
            self.poller.unregister(conn.raw)
            conn.watched = 0

    # --- gunicorn's own error answers -------------------------------------------

    def handle_error(self, req: Any, client: Any, addr: Any, exc: BaseException) -> None:
        answer_parse_error(self.log, self.cfg, req, client, addr, exc)
