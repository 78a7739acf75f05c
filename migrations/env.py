"""Alembic environment: Blockyard always hands in an open connection."""
from alembic import context

connection = context.config.attributes.get("connection")
if connection is None:  # pragma: no cover - only when someone runs the alembic CLI by hand
    raise SystemExit("run migrations through: blockyard init / blockyard upgrade")

context.configure(connection=connection, target_metadata=None, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
