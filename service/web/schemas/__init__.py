"""marshmallow schemas: the spec a client sends, the schemas generated per
model from it, and the shapes of the answers."""
