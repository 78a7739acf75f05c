"""Time ranges per import instead of a time index on the runs; metric columns as metrics arrive.

Each import holds one contiguous range of run ids (loads are serialized by the write lock), so
the smallest and largest id and finish time of its runs say which id ranges a `since`/`until`
slice has to look at: a date slice reads the imports' ranges (a few rows per night of loading)
and then only those ranges of the runs, and a load no longer builds a second index over every
run it writes.

A run row holds one column per metric slot (v1, v2, ...). A warehouse that holds no run yet
drops the slots no metric uses: the loader adds a column when a new metric takes its slot
(ALTER TABLE ... ADD COLUMN, which rewrites nothing), so a run row carries only the columns of
metrics that exist (SQLite stores a byte for every NULL column of a row). A warehouse that holds
runs keeps its columns: removing them would rewrite every run.

Revision ID: 0004
Revises: 0003
"""
import sqlite3

from alembic import op
import sqlalchemy as sa

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

METRIC_SLOTS = 24  # the value columns revision 0001 made
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
    # (ALTER TABLE ... DROP COLUMN came with SQLite 3.35; an older SQLite keeps the columns, which
    # costs load speed only)
    can_drop = conn.dialect.name != "sqlite" or sqlite3.sqlite_version_info >= (3, 35)
    if can_drop and conn.execute(sa.text("SELECT count(*) FROM (SELECT id FROM runs LIMIT 1) AS one")).scalar() == 0:
        used = conn.execute(sa.text("SELECT coalesce(max(slot), 0) FROM metrics")).scalar()
        for slot in range(int(used) + 1, METRIC_SLOTS + 1):
            op.execute(f"ALTER TABLE runs DROP COLUMN v{slot}")


def downgrade() -> None:
    conn = op.get_bind()
    have = {c["name"] for c in sa.inspect(conn).get_columns("runs")}
    for slot in range(1, METRIC_SLOTS + 1):
        if f"v{slot}" not in have:
            op.execute(f"ALTER TABLE runs ADD COLUMN v{slot} FLOAT")
    op.create_index("ix_runs_finished", "runs", ["finished_at"])
    with op.batch_alter_table("imports") as batch:
        for name in reversed(RANGE_COLUMNS):
            batch.drop_column(name)
