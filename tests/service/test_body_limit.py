"""One body limit for every route, however the body is framed (in process).

A body whose end the server marks itself (chunked: ``wsgi.input_terminated``,
PEP 3333 leaves framing to the server) was read by werkzeug up to the limit
and no further, silently: an over-long CSV was stored as its first 16 MiB.
Over the limit is now a 413 that stores nothing; a chunked body the server
cannot end is a 411 rather than an empty body. Our own contract; the status
codes are RFC 9110's (sections 15.5.12 and 15.5.14).
"""

from __future__ import annotations

import io
import json

import pytest
from flask import Flask

from service.errors import MalformedError, TooLargeError
from service.web.body_limit import BoundedBody
from tests.reliability.probes import aligned_csv
from tests.service.conftest import build_app
from tests.service.helpers import (
    ADMIN_TOKEN,
    PROBLEM,
    ApiClient,
    count_records,
    create_model,
    record,
)

LIMIT = 4096
CSV_HEADER = "key,vibration_rms,pump_family,has_vfd,failed_within_30d\n"
BODY_ROUTES = ["/v1/models", "/v1/models/pump-risk/records",
               "/v1/models/pump-risk/predictions", "/v1/models/pump-risk/retrain"]


def csv_rows(count: int) -> bytes:
    return (CSV_HEADER + "".join(f"k{i},{i % 90}.5,screw,true,ok\n"
                                 for i in range(count))).encode()


def aligned_rows(count: int) -> tuple[bytes, int]:
    return aligned_csv(CSV_HEADER, [f"{i % 90}.5,screw,true,ok" for i in range(count)], LIMIT)


def send_chunked(app: Flask, path: str, body: bytes, content_type: str,
                 terminated: bool = True) -> tuple[int, dict[str, object], str]:
    """POST ``body`` the way a server hands over a chunked request: no
    Content-Length, the stream ending where the body does."""
    overrides = {"wsgi.input_terminated": True} if terminated else {}
    response = app.test_client().post(
        path, input_stream=io.BytesIO(body), environ_overrides=overrides,
        headers={"Authorization": f"Bearer {ADMIN_TOKEN}", "Content-Type": content_type,
                 "Transfer-Encoding": "chunked"})
    return response.status_code, dict(response.headers), response.get_data(as_text=True)


@pytest.fixture
def small(sqlite_url: str) -> Flask:
    app = build_app(sqlite_url, KEELSON_MAX_BODY_BYTES=LIMIT)
    create_model(ApiClient(app))
    return app


def test_a_chunked_csv_past_the_limit_is_413_and_stores_nothing(small: Flask) -> None:
    # Cut at the limit it would still be a valid CSV of `fitting` rows: the silent loss.
    body, fitting = aligned_rows(200)
    assert 0 < fitting < 200
    status, headers, text = send_chunked(small, "/v1/models/pump-risk/records", body, "text/csv")
    assert status == 413, text
    assert headers["Content-Type"] == PROBLEM
    assert f"limit of {LIMIT} bytes" in json.loads(text)["detail"]
    assert count_records(small) == 0


@pytest.mark.parametrize("path", BODY_ROUTES)
def test_a_chunked_json_body_past_the_limit_is_413_on_every_route(small: Flask,
                                                                  path: str) -> None:
    body = json.dumps({"records": [record(i) for i in range(100)]}).encode()
    status, _, text = send_chunked(small, path, body, "application/json")
    assert status == 413, text
    assert count_records(small) == 0


def test_a_chunked_body_within_the_limit_is_read_whole(small: Flask) -> None:
    body = csv_rows(40)
    assert len(body) < LIMIT
    status, _, text = send_chunked(small, "/v1/models/pump-risk/records", body, "text/csv")
    assert status == 201, text
    assert json.loads(text) == {"accepted": 40, "duplicates": 0}
    assert count_records(small) == 40


def test_a_chunked_body_the_server_cannot_end_is_411_not_empty(small: Flask) -> None:
    status, headers, text = send_chunked(small, "/v1/models/pump-risk/records", csv_rows(3),
                                         "text/csv", terminated=False)
    assert status == 411, text
    assert headers["Content-Type"] == PROBLEM
    assert count_records(small) == 0


def test_a_declared_length_past_the_limit_is_413_before_reading(small: Flask) -> None:
    api = ApiClient(small)
    api.request("POST", "/v1/models/pump-risk/records", 413, data=csv_rows(200),
                content_type="text/csv")
    assert count_records(small) == 0


class Source:
    """A stream that records how much was asked of it."""

    def __init__(self, data: bytes) -> None:
        self.data, self.read_bytes = io.BytesIO(data), 0

    def read(self, size: int) -> bytes:
        chunk = self.data.read(size)
        self.read_bytes += len(chunk)
        return chunk


@pytest.mark.parametrize("size", [0, 1, 99, 100])
def test_bounded_body_reads_up_to_the_limit_exactly(size: int) -> None:
    source = Source(b"x" * size + b"NEXT")
    assert BoundedBody(source, 100, size).read() == b"x" * size
    assert source.read_bytes == size  # never past the declared length


def test_bounded_body_reads_one_byte_past_the_limit_at_most() -> None:
    source = Source(b"x" * 10_000)
    with pytest.raises(TooLargeError):
        BoundedBody(source, 100, None).read()
    assert source.read_bytes == 101
    assert BoundedBody(Source(b"y" * 100), 100, None).read() == b"y" * 100


def test_a_body_the_server_cannot_read_is_malformed_not_a_server_error() -> None:
    class Broken:
        def read(self, size: int) -> bytes:
            raise ValueError("bad chunk")

    with pytest.raises(MalformedError):
        BoundedBody(Broken(), 100, None).read()
