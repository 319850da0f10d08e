"""What every blueprint shares: a strict body parser and the blueprint class.

flask-smorest parses bodies with webargs, whose JSON loader is Python's
permissive one; ``StrictParser`` swaps in service.web.bodies so NaN/Infinity,
deep nesting, non-UTF-8 and non-JSON media types are refused the same way on
every route. An empty body reads as ``{}`` so optional bodies may be omitted.
"""

from __future__ import annotations

from typing import Any

import flask_smorest
from flask import Request
from webargs.flaskparser import FlaskParser

from service.web.bodies import loads_strict, require_json


class StrictParser(FlaskParser):
    def _raw_load_json(self, req: Request) -> Any:
        data = req.get_data(cache=True)
        if not data:
            return {}
        require_json(req.mimetype, req.mimetype_params.get("charset"))
        return loads_strict(data)


class Blueprint(flask_smorest.Blueprint):
    ARGUMENTS_PARSER = StrictParser()


def read_json_body(req: Request) -> Any:
    """The request's JSON body, parsed strictly (for views that parse by hand)."""
    require_json(req.mimetype, req.mimetype_params.get("charset"))
    return loads_strict(req.get_data(cache=True))
