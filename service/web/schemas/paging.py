"""Pages of a list: the query a listing route reads and the size it answers.

A list the API keeps growing (models, a model's versions) is answered a page
at a time, in a fixed order: ``limit`` items (``PAGE_SIZE`` unless asked,
at most ``MAX_PAGE_SIZE``) after the cursor ``after`` (the last key of the
page before: a model's name, a version's number). ``next`` is the cursor of
the following page, null on the last one. A cursor, not an offset: a page
never repeats nor skips an item when items are added meanwhile. Any other
query parameter, or one out of range, is refused (422): a client that misspelt
``limit`` would otherwise read the first page as if it were everything.
"""

from __future__ import annotations

from marshmallow import RAISE, Schema, fields, validate

from service.usecases.common import MODEL_NAME_PATTERN
from service.web.schemas.fields import IntegerFromText

PAGE_SIZE = 100
MAX_PAGE_SIZE = 1000


def _limit() -> IntegerFromText:
    return IntegerFromText(minimum=1, maximum=MAX_PAGE_SIZE, load_default=PAGE_SIZE,
                           metadata={"description": f"Items per page (default {PAGE_SIZE})."})


class ModelPageSchema(Schema):
    """GET /v1/models query: models by name."""

    class Meta:
        unknown = RAISE

    limit = _limit()
    after = fields.String(
        validate=validate.Regexp(f"^{MODEL_NAME_PATTERN}$", error="Not a model name."),
        metadata={"description": "The `next` of the page before: models named after it."})


class VersionPageSchema(Schema):
    """GET /v1/models/{name}/versions query: versions by number, oldest first."""

    class Meta:
        unknown = RAISE

    limit = _limit()
    after = IntegerFromText(minimum=0, maximum=2**31 - 1, metadata={
        "description": "The `next` of the page before: versions numbered above it."})

NEXT = {"description": "The `after` of the next page; null on the last page."}
