"""Time ranges per import instead of a time index on the runs.

Each import holds one contiguous range of run ids (loads are serialized by the write lock), so
the smallest and largest id and finish time of its runs say which id ranges a `since`/`until`
slice has to look at: a date slice reads the imports' ranges (a few rows per night of loading)
and then only those ranges of the runs, and a load no longer builds a second index over every
run it writes.

Revision ID: 0004
Revises: 0003
"""
from alembic import op
import sqlalchemy as sa

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

RANGE_COLUMNS = ("first_run_id", "last_run_id", "first_finished", "last_finished")


def upgrade() -> None:
    with op.batch_alter_table("imports") as batch:
        for name in RANGE_COLUMNS:
            batch.add_column(sa.Column(name, sa.BigInteger, nullable=True))
    conn = op.get_bind()
    # one pass over the runs for every import's range (retracted runs count: a range may be wider
    # than the live runs, never narrower)
    ranges = conn.execute(sa.text(
        "SELECT import_id, min(id), max(id), min(finished_at), max(finished_at) FROM runs GROUP BY import_id")).all()
    for import_id, lo, hi, first, last in ranges:
        conn.execute(sa.text(
            "UPDATE imports SET first_run_id = :lo, last_run_id = :hi, first_finished = :first, last_finished = :last"
            " WHERE id = :id"), {"lo": lo, "hi": hi, "first": first, "last": last, "id": import_id})
    op.drop_index("ix_runs_finished", "runs")


def downgrade() -> None:
    op.create_index("ix_runs_finished", "runs", ["finished_at"])
    with op.batch_alter_table("imports") as batch:
        for name in reversed(RANGE_COLUMNS):
            batch.drop_column(name)
