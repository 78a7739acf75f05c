"""The schema migrations (alembic), shipped inside the package as `warehouse.migrations`."""
