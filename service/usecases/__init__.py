"""Use cases: one module per resource. Each owns its transaction: it commits,
or rolls back and re-raises. Views call exactly one of them."""
