"""Telling, between records of a long request, whether its client has gone.

Under gunicorn the client's socket is in ``environ["gunicorn.socket"]``. By
the time a view works, the request (body included) has been read, so the
socket holds nothing more unless the client closed it (a read returns end of
file), reset it (an error), or sent a next request on the same connection
(data: still there). A non-blocking peek (``MSG_PEEK | MSG_DONTWAIT``, POSIX
recv(2)) tells these apart without consuming anything. A client that shuts
down only its sending half and still waits for the answer looks gone too;
HTTP clients do not do that (RFC 9112 section 9.6 has a client close the
whole connection). Elsewhere (the test client, other servers) there is no
socket and nothing is probed.
"""

from __future__ import annotations

import socket
from collections.abc import Callable, Mapping
from typing import Any

_PEEK = socket.MSG_PEEK | socket.MSG_DONTWAIT


def connection_closed(sock: Any) -> bool:
    """Whether the peer has closed or reset ``sock`` (nothing is read from it)."""
    try:
        return bool(sock.recv(1, _PEEK) == b"")
    except (BlockingIOError, InterruptedError):
        return False  # open, nothing waiting: the client is waiting for us
    except OSError:
        return True  # reset, or the socket is no longer usable


def client_gone_probe(environ: Mapping[str, Any]) -> Callable[[], bool] | None:
    """A function telling whether this request's client has gone, or None
    when the server does not say which socket the client is on."""
    sock = environ.get("gunicorn.socket")
    # A socket, or what Keelson's own worker class hands a thread in its place
    # (service/web/transport/connection.py: it passes recv to the socket).
    if not callable(getattr(sock, "recv", None)):
        return None
    return lambda: connection_closed(sock)
