"""The caps of a problem answer (service/web/problems.py): under 1 MiB whatever
the errors a use case raises, the dearest characters included."""

from __future__ import annotations

import json

from service.web.problems import (
    MAX_DETAIL_CHARS,
    MAX_LISTED_ERRORS,
    MAX_MESSAGE_CHARS,
    MAX_MESSAGES_PER_PATH,
    MAX_PATH_CHARS,
    clip,
    problem,
)

MIB = 1024 * 1024


def test_the_largest_errors_answer_under_a_mebibyte() -> None:
    # JSON writes a control character in 6 bytes (RFC 8259 section 7: \u0001):
    # every path, message and the detail made of them, far past each cap.
    dear = "\x01" * 10_000
    errors = {f"{i:04d}{dear}": [dear] * 10 for i in range(1000)}
    response = problem(422, dear * 100, errors=errors)
    assert len(response.data) < MIB
    body = json.loads(response.data)
    assert len(body["errors"]) == MAX_LISTED_ERRORS
    assert body["errors_omitted"] == 1000 - MAX_LISTED_ERRORS
    assert len(body["detail"]) <= MAX_DETAIL_CHARS
    for path, messages in body["errors"].items():
        assert len(path) <= MAX_PATH_CHARS and len(messages) == MAX_MESSAGES_PER_PATH
        assert all(len(message) <= MAX_MESSAGE_CHARS for message in messages)


def test_a_short_answer_is_left_whole() -> None:
    errors = {"records.0.label": ["Unknown class 'x'; expected one of ['ok', 'failed']."]}
    body = json.loads(problem(422, "Some records are invalid.", errors=errors).data)
    assert body["errors"] == errors and "errors_omitted" not in body


def test_a_clipped_text_says_how_long_it_was() -> None:
    assert clip("abc", 3) == "abc"
    cut = clip("x" * 5000, 60)
    assert len(cut) == 60 and cut.endswith("... (5,000 characters)")
