"""marshmallow schemas: the spec a client sends, the schemas generated per
model from it, and the shapes of the answers."""

from service.schemas.records import feature_schema, label_field, record_schema
from service.schemas.spec import MODEL_NAME_PATTERN, RESERVED_FIELD_NAMES, ModelSpecSchema

__all__ = [
    "MODEL_NAME_PATTERN",
    "RESERVED_FIELD_NAMES",
    "ModelSpecSchema",
    "feature_schema",
    "label_field",
    "record_schema",
]
