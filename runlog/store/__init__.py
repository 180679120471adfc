"""The catalogue store: schema, engines and migrations."""
