"""HTTP/1.1 transport for the API: the gunicorn worker that reads requests
without giving a thread to a slow client (docs/transport.md)."""
