"""PostgreSQL: no per-row reference checks on the columns a load writes.

The runs and cell_stats tables referred to campaigns, imports, solvers, instances and hosts
through foreign keys. PostgreSQL checks each with a trigger per row and per key; on a
510,000-run load they were about two thirds of the server's time (docs/performance.md), and
only a superuser may switch them off for a session. Every id a load writes comes from the
dimension tables in its own transaction (as on SQLite, whose loads switch the checks off:
ingest/devices.ForeignKeysOff), and `blockyard verify` finds an id with nothing behind it.
SQLite keeps the constraints (they cost its loads nothing). runs.retraction_id keeps its
reference on both: only a retraction writes it, a few rows at a time.

Revision ID: 0009
Revises: 0008
"""
from alembic import op
import sqlalchemy as sa

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None

LOADED = {"campaign_id": "campaigns", "import_id": "imports", "solver_id": "solvers",
          "instance_id": "instances", "host_id": "hosts"}


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    inspector = sa.inspect(bind)
    for table in ("runs", "cell_stats"):
        for fk in inspector.get_foreign_keys(table):
            if fk["constrained_columns"] and fk["constrained_columns"][0] in LOADED and fk["name"]:
                op.drop_constraint(fk["name"], table, type_="foreignkey")


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        return
    for table in ("runs", "cell_stats"):
        for col, parent in LOADED.items():
            op.create_foreign_key(f"{table}_{col}_fkey", table, parent, [col], ["id"])
