"""Storage layer: the schema, migrations and the connection to a warehouse."""
