"""HTTP blueprints, one per resource."""
