"""Where a request ends (service.web.transport.framing), by RFC 9112 section 6
(message body length) and 7.1 (chunked transfer coding), fed whole and byte
by byte: the scan must reach the same verdict however the bytes arrive."""

from __future__ import annotations

import pytest

from service.web.transport.framing import MAX_CHUNK_LINE, Progress, Refusal, RequestFraming

HEAD_LIMIT, LINE_LIMIT, BODY_LIMIT = 4096, 1024, 1000


def framing() -> RequestFraming:
    return RequestFraming(HEAD_LIMIT, LINE_LIMIT, BODY_LIMIT)


def verdicts(data: bytes) -> list[Progress | Refusal]:
    """The scan's answer after each byte, until it stops asking for more."""
    scan, seen = framing(), []
    for end in range(1, len(data) + 1):
        seen.append(scan.scan(data[:end]))
        if not isinstance(seen[-1], Progress) or seen[-1] is Progress.READY:
            break
    return seen


def final(data: bytes) -> Progress | Refusal:
    whole = framing().scan(data)
    assert verdicts(data)[-1] == whole  # byte by byte ends the same way
    return whole


def head(*lines: str) -> bytes:
    return ("\r\n".join(lines) + "\r\n\r\n").encode()


GET = head("GET /healthz HTTP/1.1", "Host: x")


def test_a_request_without_a_body_is_ready_at_its_blank_line() -> None:
    seen = verdicts(GET)
    assert seen[:-1] == [Progress.HEAD] * (len(GET) - 1) and seen[-1] is Progress.READY


def test_a_body_of_declared_length_is_ready_when_whole() -> None:
    request = head("POST /v1/models HTTP/1.1", "Host: x", "Content-Length: 5") + b"hello"
    seen = verdicts(request)
    assert seen[-1] is Progress.READY and len(seen) == len(request)
    assert seen[-2] is Progress.BODY
    assert framing().scan(request + GET) is Progress.READY  # a pipelined request behind it


def test_a_declared_length_over_the_limit_is_refused_with_the_head() -> None:
    verdict = final(head("POST /v1/models HTTP/1.1", "Host: x", "content-length: 1001"))
    assert isinstance(verdict, Refusal) and verdict.status == 413


def chunked(*chunks: bytes, trailer: bytes = b"") -> bytes:
    body = b"".join(b"%x\r\n%s\r\n" % (len(c), c) for c in chunks)
    return (head("POST /v1/models HTTP/1.1", "Host: x", "Transfer-Encoding: chunked") + body
            + b"0\r\n" + trailer + b"\r\n")


def test_a_chunked_body_is_ready_after_its_last_chunk_and_trailers() -> None:
    for request in (chunked(b"abc", b"d" * 300), chunked(b"x", trailer=b"X-Sum: 1\r\n"),
                    chunked()):
        seen = verdicts(request)
        assert seen[-1] is Progress.READY and len(seen) == len(request)
        assert set(seen[:-1]) <= {Progress.HEAD, Progress.BODY}


def test_a_chunked_body_over_the_limit_is_refused_at_the_size_that_passes_it() -> None:
    request = chunked(b"a" * 600, b"b" * 600)
    seen = verdicts(request)
    assert isinstance(seen[-1], Refusal) and seen[-1].status == 413
    # refused once the second size line is read, before its data
    assert len(seen) < len(request) - 600


@pytest.mark.parametrize(("body", "status"), [
    (b"zz\r\nabc\r\n0\r\n\r\n", 400),  # not hexadecimal
    (b"3\r\nabcXY0\r\n\r\n", 400),  # data longer than its size
    (b"1" * (MAX_CHUNK_LINE + 10), 400),  # a size line without end
])
def test_broken_chunks_are_refused(body: bytes, status: int) -> None:
    request = head("POST / HTTP/1.1", "Host: x", "Transfer-Encoding: chunked") + body
    verdict = final(request)
    assert isinstance(verdict, Refusal) and verdict.status == status


def test_an_endless_trailer_section_is_refused() -> None:
    request = chunked(b"x")[:-2] + b"".join(b"X-T%d: %s\r\n" % (i, b"v" * 100)
                                            for i in range(60))
    verdict = final(request)
    assert isinstance(verdict, Refusal) and verdict.status == 431


@pytest.mark.parametrize("fields", [
    ("Content-Length: 2", "Transfer-Encoding: chunked"),  # both framings
    ("Content-Length: 2", "Content-Length: 2"),  # repeated
    ("Content-Length: +2",),  # not digits
    ("Transfer-Encoding: gzip",),  # not ending in chunked
    ("Transfer-Encoding: chunked, chunked",),
])
def test_a_head_that_cannot_be_framed_is_handed_over_at_once(fields: tuple[str, ...]) -> None:
    # gunicorn's parser refuses it with a 400; the body is not waited for.
    assert final(head("POST / HTTP/1.1", "Host: x", *fields)) is Progress.READY


def test_chunked_in_http_1_0_is_handed_over() -> None:
    assert final(head("POST / HTTP/1.0", "Transfer-Encoding: chunked")) is Progress.READY


def test_lines_ending_in_bare_lf_are_handed_over() -> None:
    assert final(b"GET / HTTP/1.1\nHost: x\n\n") is Progress.READY


def test_over_long_request_lines_and_heads_are_refused() -> None:
    line = final(b"GET /" + b"a" * LINE_LIMIT + b" HTTP/1.1\r\n")
    assert isinstance(line, Refusal) and line.status == 414
    big = final(b"GET / HTTP/1.1\r\n" + b"X-A: " + b"b" * HEAD_LIMIT)
    assert isinstance(big, Refusal) and big.status == 431


def test_a_continue_expectation_is_noticed_only_with_a_body() -> None:
    scan = framing()
    assert scan.scan(head("POST / HTTP/1.1", "Expect: 100-continue", "Content-Length: 3")) \
        is Progress.BODY
    assert scan.expects_continue
    scan = framing()
    assert scan.scan(head("GET / HTTP/1.1", "Expect: 100-continue")) is Progress.READY
