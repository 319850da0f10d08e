"""The security headers every answer carries, whoever makes it: the app's
middleware (service.web.app.SecurityHeaders) and the transport's own answers
(service.web.transport.answers)."""

from __future__ import annotations

SECURITY_HEADERS = {
    "X-Content-Type-Options": "nosniff",
    "X-Frame-Options": "DENY",
    "Referrer-Policy": "no-referrer",
    "Content-Security-Policy": "default-src 'none'; frame-ancestors 'none'",
    "Cache-Control": "no-store",
}
