"""Strict marshmallow fields: JSON types are taken as they are, never coerced.

marshmallow's own fields coerce (``"4.1"`` to 4.1, ``1`` to True, ``True`` to
1); an API that must reject "string in a number" and "bool is not a number"
cannot use them for values. Each field here accepts exactly one JSON type.
The ``*FromText`` variants read the same values from text (query strings, CSV
cells), with the same rules once converted.
"""

from __future__ import annotations

import math
import re
import sys
from collections.abc import Sequence
from typing import Any

from marshmallow import ValidationError, fields, validate

from service.web.problems import clip

_JSON_NUMBER = re.compile(r"-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?")
_DIGITS = re.compile(r"-?[0-9]{1,20}")  # read exactly as an integer
NON_FINITE = "NaN and Infinity are not numbers JSON allows (RFC 8259 section 6)."
TRUE_TEXT = frozenset({"true", "1"})
FALSE_TEXT = frozenset({"false", "0"})
# The largest finite double (IEEE 754 binary64): every number the API takes is
# one, and the documents say so, so "any number" always has these bounds.
LARGEST = sys.float_info.max
LARGEST_INT = int(LARGEST)
# A message names the allowed choices only when they are this few, and echoes
# at most this many characters of a bad value: a 34 KB ingest of bad records
# once drew a 102 MB answer, each record repeating a field's 300 levels.
LISTED_CHOICES = 10
ECHOED_CHARS = 60
_ALL_OF = {"level": "levels of this field", "class": "classes of the model"}


def _document(field: fields.Field[Any], **values: Any) -> None:
    """Add JSON Schema 2020-12 keywords (the dialect of OpenAPI 3.1) to a field's
    metadata (what apispec documents), keeping any the caller passed; ``None``
    values are left out."""
    field.metadata = {**{k: v for k, v in values.items() if v is not None}, **field.metadata}


def _finite(value: float | int) -> float:
    # An integer just beyond the largest double would round down to it:
    # refused like any larger one, as the documented bounds say.
    if type(value) is int and not -LARGEST_INT <= value <= LARGEST_INT:
        raise ValidationError("Number is too large.")
    number = float(value)
    if not math.isfinite(number):
        raise ValidationError(NON_FINITE)
    return number


class WholeMatch(validate.Regexp):
    """A string that ``pattern`` (given without anchors) matches whole.

    marshmallow's ``Regexp`` uses ``re.match``, and Python's ``$`` also matches
    before a final newline: ``"station-risk\\n"`` passed ``^...$`` and became a
    look-alike name no URL reaches. This matches with ``re.fullmatch``. The
    published pattern stays ``^...$``: JSON Schema patterns are ECMA-262 regular
    expressions (JSON Schema 2020-12 validation, section 6.3.3), where ``$``
    matches only at the very end.
    """

    def __init__(self, pattern: str, *, error: str | None = None) -> None:
        super().__init__(f"^{pattern}$", error=error)
        self.whole = re.compile(f"^{pattern}$")

    def __call__(self, value: Any) -> Any:
        if not isinstance(value, str) or self.whole.fullmatch(value) is None:
            raise ValidationError(self._format_error(value))
        return value


class StrictNumber(fields.Field[Any]):
    """A finite JSON number (not a bool, not a string), optionally bounded.

    Deserialises to ``float`` when ``as_float`` (record values); otherwise the
    number is kept as sent (an int stays an int in a stored spec).
    """

    def __init__(
        self,
        *,
        minimum: float | None = None,
        maximum: float | None = None,
        exclusive_minimum: bool = False,
        as_float: bool = False,
        **kwargs: Any,
    ) -> None:
        super().__init__(**kwargs)
        self.minimum = minimum
        self.maximum = maximum
        self.exclusive_minimum = exclusive_minimum
        self.as_float = as_float
        exclusive = minimum is not None and exclusive_minimum
        _document(self, type="number",
                  minimum=None if exclusive else -LARGEST if minimum is None else minimum,
                  exclusiveMinimum=minimum if exclusive else None,
                  maximum=LARGEST if maximum is None else maximum)

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ValidationError("Not a number.")
        return self.check(value)

    def check(self, value: int | float) -> Any:
        number = _finite(value)
        if self.minimum is not None and (
            number <= self.minimum if self.exclusive_minimum else number < self.minimum
        ):
            relation = "above" if self.exclusive_minimum else "at least"
            raise ValidationError(f"Must be {relation} {self.minimum}.")
        if self.maximum is not None and number > self.maximum:
            raise ValidationError(f"Must be at most {self.maximum}.")
        return number if self.as_float else value


class NumberFromText(StrictNumber):
    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if not isinstance(value, str):
            return super()._deserialize(value, attr, data, **kwargs)
        text = value.strip()
        try:
            number = float(text)
        except ValueError as exc:
            raise ValidationError("Not a number.") from exc
        # float() also reads "1_000", "0012" and non-ASCII digits; a number
        # spelled as text must be spelled as JSON spells it (RFC 8259 section 6).
        if math.isfinite(number) and not _JSON_NUMBER.fullmatch(text):
            raise ValidationError("Not a number.")
        return self.check(number)


class StrictInteger(fields.Field[Any]):
    """A JSON integer (not a bool, not a string), optionally bounded.

    ``2.0`` is the integer 2: JSON has one number type (RFC 8259 section 6) and
    JSON Schema counts a number with a zero fractional part as an integer, so
    the published documents call it valid. ``2.5`` is refused.
    """

    def __init__(
        self, *, minimum: int | None = None, maximum: int | None = None, **kwargs: Any
    ) -> None:
        super().__init__(**kwargs)
        self.minimum = minimum
        self.maximum = maximum
        _document(self, type="integer", minimum=minimum, maximum=maximum)

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        elif isinstance(value, bool) or not isinstance(value, int):
            raise ValidationError("Not an integer.")
        if self.minimum is not None and value < self.minimum:
            raise ValidationError(f"Must be at least {self.minimum}.")
        if self.maximum is not None and value > self.maximum:
            raise ValidationError(f"Must be at most {self.maximum}.")
        return value


class IntegerFromText(StrictInteger):
    """An integer spelled as JSON spells a number with no fraction (``7``,
    ``7.0``, ``7e2``; not ``7.5``, ``+7`` or ``0x7``): the same integers as the
    JSON form."""

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str):
            if _DIGITS.fullmatch(value):
                value = int(value)
            elif _JSON_NUMBER.fullmatch(value):
                number = float(value)
                if not math.isfinite(number) or not number.is_integer():
                    raise ValidationError("Not an integer.")
                value = int(number)
            else:
                raise ValidationError("Not an integer.")
        return super()._deserialize(value, attr, data, **kwargs)


class StrictBoolean(fields.Field[Any]):
    """JSON ``true`` or ``false``; nothing else."""

    def __init__(self, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        _document(self, type="boolean")

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if not isinstance(value, bool):
            raise ValidationError("Not a boolean (true or false).")
        return value


class BooleanFromText(StrictBoolean):
    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str):
            text = value.strip().lower()
            if text in TRUE_TEXT:
                return True
            if text in FALSE_TEXT:
                return False
        return super()._deserialize(value, attr, data, **kwargs)


class Choice(fields.Field[Any]):
    """One of a fixed list of JSON values, compared by type and value (so
    ``true`` is not ``1`` and ``"1"`` is not ``1``): levels and classes.

    ``1.0`` is the integer choice ``1``: JSON has one number type (RFC 8259
    section 6), and JSON Schema's ``enum`` compares numbers by value.
    """

    def __init__(self, choices: Sequence[Any], *, what: str = "value", **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.choices = list(choices)
        self.lookup = {(type(c), c): c for c in self.choices}
        self.what = what
        _document(self, enum=self.choices)

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        found = choose(self.lookup, value)
        if found is MISSING:
            raise ValidationError(self.unknown(value))
        return found

    def unknown(self, value: Any) -> str:
        """The message for a value that is none of the choices."""
        if isinstance(value, str) and len(value) > ECHOED_CHARS:
            # Cut before its repr is made: a bad value may be megabytes long.
            shown = f"{value[:ECHOED_CHARS]!r}... ({len(value):,} characters)"
        else:
            shown = clip(repr(value), ECHOED_CHARS + 2)  # a string's quotes
        if len(self.choices) <= LISTED_CHOICES:
            return f"Unknown {self.what} {shown}; expected one of {self.choices!r}."
        every = _ALL_OF.get(self.what, f"{self.what}s of this field")
        return (f"Unknown {self.what} {shown}: not one of the {len(self.choices):,} {every}; "
                "GET /v1/models/{name}/schema lists them.")


class ChoiceFromText(Choice):
    """A choice spelled as text: ``failed``, ``true``, ``3``."""

    def __init__(self, choices: Sequence[Any], **kwargs: Any) -> None:
        super().__init__(choices, **kwargs)
        self.by_text = {_as_text(c): c for c in self.choices}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str) and value.strip() in self.by_text:
            return self.by_text[value.strip()]
        return super()._deserialize(value, attr, data, **kwargs)


MISSING = object()


def choose(lookup: dict[tuple[type, Any], Any], value: Any) -> Any:
    """The choice ``value`` names in ``lookup`` (keyed by (type, value)), or MISSING."""
    try:
        return lookup[(type(value), value)]
    except KeyError:
        if type(value) is float and value.is_integer():
            return lookup.get((int, int(value)), MISSING)
        return MISSING
    except TypeError:  # unhashable: a list or an object is never a choice
        return MISSING


def _as_text(choice: Any) -> str:
    if isinstance(choice, bool):
        return "true" if choice else "false"
    return str(choice)


class AnyValue(fields.Field[Any]):
    """A value some model may declare, before the model is known: a finite
    number, a string of 1 to ``max_length`` characters (a level or a class), or
    a boolean. Documents the model-independent part of a record."""

    def __init__(self, *, max_length: int, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.max_length = max_length
        _document(self, oneOf=[
            {"type": "number", "minimum": -LARGEST, "maximum": LARGEST},
            {"type": "string", "minLength": 1, "maxLength": max_length},
            {"type": "boolean"},
        ])

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, bool):
            return value
        if isinstance(value, int | float):
            _finite(value)
            return value
        if isinstance(value, str) and 1 <= len(value) <= self.max_length:
            return value
        raise ValidationError(f"Not a number, a string of 1 to {self.max_length} characters "
                              "or a boolean.")
