"""What a fault shows (``trainer.error``, a job's ``error``) is in our words;
what an exception says of internals (its class, a query, a file path) goes to
the log only."""

from __future__ import annotations

from engine import EngineError
from service.worker.faults import UNEXPECTED, ModelFault, describe, log_text

INSIDE = "SELECT * FROM records WHERE path = '/srv/keelson/state.db'"


def test_an_unexpected_error_is_shown_as_our_sentence_and_logged_in_full() -> None:
    exc = KeyError(INSIDE)
    assert describe(exc) == UNEXPECTED
    assert log_text(exc) == f"KeyError: {exc}"


def test_a_fault_we_wrote_is_shown_as_written_and_its_detail_only_logged() -> None:
    fault = ModelFault("the model's stored spec cannot be read", detail=INSIDE)
    assert describe(fault) == "the model's stored spec cannot be read"
    assert log_text(fault) == f"the model's stored spec cannot be read ({INSIDE})"
    assert describe(EngineError("row 0: not finite")) == "row 0: not finite"


def test_what_the_decoder_said_of_a_damaged_record_is_logged_not_shown() -> None:
    from service.store.record_log import UnreadableRecord

    damaged = UnreadableRecord("record 7 cannot be read: its features are not valid JSON",
                               "surrogates not allowed: line 1 column 9")
    assert describe(damaged) == "record 7 cannot be read: its features are not valid JSON"
    assert log_text(damaged).endswith("(surrogates not allowed: line 1 column 9)")
