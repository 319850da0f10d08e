"""parse_csv_records (RFC 4180), as the CLI's import uses it directly."""

from __future__ import annotations

import pytest

from service.errors import InvalidInputError, MalformedError, TooLargeError
from service.web.csv_records import parse_csv_records
from tests.service.helpers import model_spec

SPEC = {**model_spec(), "classes": ["ok", "failed"]}
HEADER = "key,vibration_rms,pump_family,has_vfd,failed_within_30d\r\n"


def test_quoted_fields_line_breaks_and_a_byte_order_mark() -> None:
    # RFC 4180 section 2: fields may be quoted; quotes inside are doubled;
    # quoted fields may hold commas and line breaks.
    text = ("\ufeff" + HEADER + '"a,""1""\r\nb",1e1,screw,False,"failed"\r\n'
            "\r\nk2,0,centrifugal,1,ok")
    assert parse_csv_records(text, SPEC) == [
        {"key": 'a,"1"\r\nb', "features": {"vibration_rms": 10.0, "pump_family": "screw",
                                          "has_vfd": False}, "label": "failed"},
        {"key": "k2", "features": {"vibration_rms": 0.0, "pump_family": "centrifugal",
                                   "has_vfd": True}, "label": "ok"},
    ]


def test_errors_name_rows_and_columns() -> None:
    with pytest.raises(InvalidInputError) as error:
        parse_csv_records(HEADER + "a,1,screw,true,ok\r\nb,500,screw,true,ok\r\n", SPEC)
    assert list(error.value.errors or {}) == ["records.1.features.vibration_rms"]
    with pytest.raises(MalformedError):
        parse_csv_records(HEADER + 'a,"1,screw,true,ok\r\n', SPEC)
    with pytest.raises(TooLargeError):
        parse_csv_records(HEADER + "a,1,screw,true,ok\r\n" * 3, SPEC, max_records=2)
