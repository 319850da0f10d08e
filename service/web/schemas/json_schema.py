"""JSON Schema 2020-12 documents of one model: a record, a prediction request, an outcome.

Served at ``GET /v1/models/{name}/schema`` so clients can validate and generate
code for that model. Each document is generated from the marshmallow schema
the API itself checks with (built from the model's ``RecordRules``), through
apispec's converter in its OpenAPI 3.1 mode (whose schema dialect is JSON
Schema 2020-12): what a document calls valid is what the API accepts.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin
from marshmallow import RAISE, Schema, fields, validate

from service.web.schemas.predictions import options_fields
from service.web.schemas.rules import RecordRules, key_field

DIALECT = "https://json-schema.org/draft/2020-12/schema"
_COMPONENTS = "#/components/schemas/"


def json_schema(schema: Schema, *, title: str, description: str) -> dict[str, Any]:
    """A self-contained JSON Schema 2020-12 document of what ``schema`` loads
    (nested schemas become ``$defs``)."""
    spec = APISpec(title=title, version="1", openapi_version="3.1.0",
                   plugins=[MarshmallowPlugin()])
    spec.components.schema(title, schema=schema)
    definitions = dict(spec.to_dict()["components"]["schemas"])
    root = definitions.pop(title)
    document: dict[str, Any] = {"$schema": DIALECT, "title": title,
                                "description": description, **root}
    if definitions:
        document["$defs"] = definitions
    converted: dict[str, Any] = _local_refs(document)
    return converted


def _local_refs(value: Any) -> Any:
    if isinstance(value, list):
        return [_local_refs(item) for item in value]
    if not isinstance(value, dict):
        return value
    out = {key: _local_refs(item) for key, item in value.items()}
    if isinstance(out.get("$ref"), str) and out["$ref"].startswith(_COMPONENTS):
        out["$ref"] = "#/$defs/" + out["$ref"][len(_COMPONENTS):]
    return out


def prediction_request_schema(rules: RecordRules, *, max_records: int) -> Schema:
    """The POST predictions body of this model: records of features, and the
    options, ``output`` being one of its classes (a regression model has none)."""
    declared: dict[str, fields.Field[Any]] = dict(options_fields(text=False))
    classes = rules.classes
    if classes is None:
        del declared["output"]
    else:
        declared["output"] = rules.label.field(required=False, metadata={
            "description": "The class whose probability is explained; default the "
            "predicted class."})
    item = Schema.from_dict({"key": key_field(), "features": fields.Nested(
        rules.feature_schema(), required=True)}, name="PredictionRecord")
    declared["records"] = fields.List(
        fields.Nested(item(unknown=RAISE)), required=True,
        validate=validate.Length(min=1, max=max_records))
    return Schema.from_dict(declared, name="PredictionRequest")(unknown=RAISE)


def model_documents(name: str, rules: RecordRules, *, max_records: int,
                    max_predictions: int) -> dict[str, Any]:
    """The three documents of model ``name``, as ``GET .../schema`` answers them."""
    return {
        "model": name,
        "record": json_schema(rules.record_schema(), title="Record", description=(
            f"One labelled record of model {name!r}; an ingest request sends "
            f'{{"records": [record, ...]}} with 1 to {max_records} of them.')),
        "prediction_request": json_schema(
            prediction_request_schema(rules, max_records=max_predictions),
            title="PredictionRequest",
            description=f"The body of POST /v1/models/{name}/predictions."),
        "outcome": json_schema(rules.outcome_schema(), title="Outcome", description=(
            f"What happened to a case of model {name!r}: its key and its label.")),
    }


def limits(config: Mapping[str, Any]) -> dict[str, int]:
    """The request limits of an app's settings, as ``model_documents`` takes them."""
    return {"max_records": int(config["KEELSON_MAX_RECORDS_PER_REQUEST"]),
            "max_predictions": int(config["KEELSON_MAX_PREDICTION_BATCH"])}
