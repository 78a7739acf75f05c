"""SQLite: no index on the run key.

Building the unique index on (campaign, solver, instance, seed, replicate) took a fifth of a
large load into SQLite, and keeping it took the same again spread over smaller ones. A SQLite
load now proves its runs new from the cell summaries and a hash of its own run keys, and falls
back to a unique index on its campaign's keys alone for the length of the load when it cannot
(warehouse/ingest/runkey.py). Slices on the runs find a campaign's runs through its imports' id
ranges instead of the index. PostgreSQL keeps the index: its loads insert past conflicts.

Revision ID: 0007
Revises: 0006
"""
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def upgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.drop_index("ux_runs_key", "runs")


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.create_index("ux_runs_key", "runs", ["campaign_id", "solver_id", "instance_id", "seed", "replicate"],
                        unique=True)
