"""Secrets in query strings never reach the access log, whatever their
spelling. RFC 6750 section 2.3 names ``access_token``; the other names are
common practice for keys and tokens (no source)."""

from __future__ import annotations

import logging

import pytest

from service.web.observability import AccessFields
from service.web.redaction import redacted_query

SECRET = "s3cr3t-value"
NAMES = ["access_token", "access%5Ftoken", "access%255Ftoken", "ACCESS_TOKEN", "access-token",
         "api_key", "api-key", "apiKey", "API%5FKEY", "key", "token", "auth", "bearer",
         "authorization", "Authorization", "%74oken", "x_api_key", "refresh_token",
         "password", "client_secret", "token+", "to%6Ben"]


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("separator", ["&", ";"])
def test_secret_parameters_are_redacted_by_their_decoded_name(name: str,
                                                              separator: str) -> None:
    query = f"vibration_rms=1.5{separator}{name}={SECRET}{separator}has_vfd=true"
    redacted = redacted_query(query)
    assert SECRET not in redacted
    assert redacted == (f"vibration_rms=1.5{separator}{name}=[redacted]{separator}"
                        "has_vfd=true")


@pytest.mark.parametrize("query", ["vibration_rms=1.5&pump_family=screw&has_vfd=true",
                                   "keyword_count=3", "monkey=1", "author=x", "",
                                   "explain=integrated_gradients&output=failed"])
def test_other_parameters_are_left_as_sent(query: str) -> None:
    assert redacted_query(query) == query


def test_the_access_log_fields_and_line_are_redacted() -> None:
    query = f"x=1&access%5Ftoken={SECRET}"
    atoms = {"h": "127.0.0.1", "m": "GET", "U": "/v1/models", "q": query, "s": "401",
             "r": f"GET /v1/models?{query} HTTP/1.1", "B": 10, "D": 1000, "a": "probe",
             "{x-request-id}o": "rid-1"}
    record = logging.LogRecord("gunicorn.access", logging.INFO, __file__, 1,
                               '%(h)s "%(r)s" %(s)s', (atoms,), None)
    assert AccessFields().filter(record)
    assert SECRET not in record.getMessage()
    assert SECRET not in str(record.query)
    assert "access%5Ftoken=[redacted]" in record.getMessage()
