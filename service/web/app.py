"""The app factory: configuration, database, auth, error envelope, blueprints."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import flask_smorest
from flask import Flask
from flask_smorest.spec.plugins import integerconverter2paramschema
from werkzeug.routing import IntegerConverter

from service.config import load_config
from service.web import auth, observability, pages, paths, problems, request_target
from service.web.body_limit import BoundedRequest
from service.web.domain_metrics import ModelStateCollector
from service.web.drift_metrics import DriftCollector
from service.web.extensions import get_database, init_database, init_drift, init_version_cache
from service.web.headers import SECURITY_HEADERS
from service.web.openapi import DocumentingPlugin, openapi_document
from service.web.schemas.views import ProblemSchema
from service.web.track_record_metrics import TrackRecordCollector
from service.web.views import (
    drift,
    forget,
    history,
    jobs,
    models,
    ops,
    outcomes,
    predictions,
    records,
    sweeps,
    track_record,
    versions,
)

# Registered in this order; a blueprint is one resource (service/web/views/*.py).
BLUEPRINTS = [
    ops.blueprint,
    models.blueprint,
    records.blueprint,
    outcomes.blueprint,
    versions.blueprint,
    predictions.blueprint,
    sweeps.blueprint,
    drift.blueprint,
    jobs.blueprint,
    track_record.blueprint,
    history.blueprint,
    forget.blueprint,
]

# The largest id or number a path can name: job ids and version numbers are
# 32-bit INTEGER columns (PostgreSQL refuses a larger parameter: it was a 500).
MAX_PATH_INTEGER = 2**31 - 1


class BoundedIntegerConverter(IntegerConverter):
    """``<int:...>`` path segments beyond what the database can hold match no
    route (404), instead of overflowing the database or its driver (500)."""

    def __init__(self, map: Any, fixed_digits: int = 0, min: int | None = None,
                 max: int | None = MAX_PATH_INTEGER, signed: bool = False) -> None:
        super().__init__(map, fixed_digits, min, max, signed)


class Api(flask_smorest.Api):  # type: ignore[misc]  # flask-smorest ships no types
    """flask-smorest's Api documenting errors as RFC 9457 problem details."""

    ERROR_SCHEMA = ProblemSchema

    def _register_responses(self) -> None:
        # Errors are answered as application/problem+json (service.web.problems):
        # document them so, or clients validating against the document reject them.
        self.DEFAULT_RESPONSE_CONTENT_TYPE = problems.PROBLEM_MIMETYPE
        try:
            super()._register_responses()
        finally:
            del self.DEFAULT_RESPONSE_CONTENT_TYPE


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the API app; ``config`` overrides the environment (tests pass one)."""
    app = Flask("keelson", static_folder=None)
    app.request_class = BoundedRequest
    paths.init_app(app)
    request_target.init_app(app)
    app.url_map.converters["int"] = BoundedIntegerConverter
    settings = load_config(config)
    app.config.update(settings)
    app.config.update(
        MAX_CONTENT_LENGTH=settings["KEELSON_MAX_BODY_BYTES"],
        API_TITLE="Keelson",
        API_VERSION="1",
        # 3.1: its schemas are JSON Schema 2020-12, the dialect each model's
        # own documents (GET /v1/models/{name}/schema) are written in.
        OPENAPI_VERSION="3.1.0",
        JSON_SORT_KEYS=False,
    )
    app.json.sort_keys = False  # type: ignore[attr-defined]
    init_database(app)
    init_version_cache(app)
    init_drift(app)
    auth.init_app(app)
    observability.init_app(app)
    observability.add_scrape_collector(app, ModelStateCollector(get_database(app)))
    observability.add_scrape_collector(app, TrackRecordCollector(get_database(app)))
    api = Api(app, spec_kwargs={"info": {"description": "Keelson HTTP API (v1)."},
                                "marshmallow_plugin": DocumentingPlugin()})
    api.register_converter(BoundedIntegerConverter, integerconverter2paramschema)
    api.register_converter(paths.ModelNameConverter, paths.model_name_parameter)
    api.spec.components.security_scheme("bearer", {"type": "http", "scheme": "bearer"})
    for blueprint in BLUEPRINTS:
        api.register_blueprint(blueprint)
    problems.init_app(app)
    pages.init_app(app)
    observability.add_scrape_collector(app, DriftCollector(app))
    app.extensions["keelson.openapi"] = openapi_document(app, api.spec)
    app.wsgi_app = SecurityHeaders(app.wsgi_app)  # type: ignore[method-assign]
    return app


class SecurityHeaders:
    """WSGI middleware: every answer carries ``SECURITY_HEADERS``, unless the
    app gave one of them a value of its own.

    Added to the plain list given to ``start_response``, in front of Flask:
    werkzeug's header object lower-cases and scans its list on each
    ``setdefault``, five times per request; this is one pass. Answers made
    outside Flask's hooks are covered too.
    """

    _HEADERS = [(name, value) for name, value in SECURITY_HEADERS.items()]
    _LOWERED = frozenset(name.lower() for name in SECURITY_HEADERS)

    def __init__(self, app: Any) -> None:
        self.app = app

    def __call__(self, environ: dict[str, Any], start_response: Any) -> Any:
        def start_secured(status: str, headers: list[tuple[str, str]],
                          exc_info: Any = None) -> Any:
            given = {name.lower() for name, _ in headers} & self._LOWERED
            if given:
                headers.extend(h for h in self._HEADERS if h[0].lower() not in given)
            else:
                headers.extend(self._HEADERS)
            return start_response(status, headers, exc_info)

        return self.app(environ, start_secured)
