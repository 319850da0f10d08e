"""The OpenAPI document at /openapi.json: built from the schemas the API checks with.

apispec turns each marshmallow schema into its JSON Schema; two things it
cannot see are added here. A schema may state rules that tie its fields
together (a binary task has two classes, only a categorical feature has
levels) as a class attribute ``DOCUMENTED_RULES``: JSON Schema keywords merged
into its component, next to the checks that enforce them (the fuzz tests hold
the two together). And the batch and spec limits are settings, so they are
written into each app's document rather than into schemas made at import.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from typing import Any

from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin
from apispec.ext.marshmallow.common import resolve_schema_cls
from apispec.ext.marshmallow.openapi import OpenAPIConverter
from flask import Flask

from service.web import auth

# Request bodies whose ``records`` are bounded by a setting (413 beyond it).
LIMITED_BATCHES = {"RecordBatch": "KEELSON_MAX_RECORDS_PER_REQUEST",
                   "PredictionRequest": "KEELSON_MAX_PREDICTION_BATCH"}
# Lists in a model spec bounded by a setting: (component, property) -> setting.
LIMITED_SPEC_LISTS = {("ModelSpec", "features"): "KEELSON_MAX_FEATURES",
                      ("ModelSpec", "classes"): "KEELSON_MAX_CLASSES",
                      ("Feature", "levels"): "KEELSON_MAX_LEVELS"}
_CONVERTER = re.compile(r"<(?:[^:<>]+:)?([^<>]+)>")


class DocumentingConverter(OpenAPIConverter):
    """apispec's converter, adding the ``DOCUMENTED_RULES`` a schema class
    declares itself (not inherited: a subclass states its own)."""

    def schema2jsonschema(self, schema: Any) -> dict[str, Any]:
        convert: Callable[[Any], dict[str, Any]] = super().schema2jsonschema
        document = convert(schema)
        rules = vars(resolve_schema_cls(schema)).get("DOCUMENTED_RULES")
        if rules:
            document.update(copy.deepcopy(rules))
        return document


class DocumentingPlugin(MarshmallowPlugin):
    Converter = DocumentingConverter


def state_limits(document: dict[str, Any], config: Any) -> None:
    """Write this app's batch and spec limits into ``document``."""
    schemas = document.get("components", {}).get("schemas", {})
    for name, setting in LIMITED_BATCHES.items():
        schemas[name]["properties"]["records"]["maxItems"] = int(config[setting])
    for (name, member), setting in LIMITED_SPEC_LISTS.items():
        schemas[name]["properties"][member]["maxItems"] = int(config[setting])


def openapi_document(app: Flask, spec: APISpec) -> Callable[[], dict[str, Any]]:
    """A function returning the OpenAPI document, built once on first use, with
    the app's limits and each operation's security taken from the scope its
    view declares."""
    built: list[dict[str, Any]] = []

    def document() -> dict[str, Any]:
        if built:
            return built[0]
        result: dict[str, Any] = copy.deepcopy(spec.to_dict())
        state_limits(result, app.config)
        for rule in app.url_map.iter_rules():
            scope = auth.declared_scope(app.view_functions.get(rule.endpoint))
            path = result.get("paths", {}).get(_CONVERTER.sub(r"{\1}", rule.rule), {})
            for method in rule.methods or ():
                operation = path.get(method.lower())
                if operation is None or scope is None:
                    continue
                if scope == auth.PUBLIC:
                    operation["security"] = []
                else:
                    operation["security"] = [{"bearer": []}]
                    operation["x-scope"] = scope
        built.append(result)
        return result

    return document
