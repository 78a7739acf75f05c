"""Reloads and renewals: a file may be loaded again once its import is wholly retracted, and a
stale analysis may be re-run into a new one that takes over its claims.

- imports.sha256 is no longer unique by itself. A reload (`blockyard load --again`) stores the
  same bytes under a new import, which names the one it replaces (imports.replaces_import_id);
  the loader refuses a file whose earlier import still holds live runs. The unique index on
  (sha256, coalesce(replaces_import_id, 0)) keeps the guard that concurrent loads relied on: a
  file goes in once as a first load, and each import is replaced at most once, whichever of
  several processes gets there first.
- analyses.renewed_from_id: `blockyard recheck ID --renew` stores the re-run as a new analysis
  that points at the one it renews; the claims move to it.
- PostgreSQL: the run key (ux_runs_key) holds live runs only, so that a file reloaded into its
  own campaign goes in beside its retracted runs under the same keys; the loader keeps the
  keys of other retracted runs itself (ingest/runkey.py). SQLite holds no run key (0007).

SQLite cannot drop a column's UNIQUE in place, so its imports table is rebuilt (a few rows per
file ever loaded) with foreign keys off for the length of the migration (connect.migrate), as
SQLite's own documentation prescribes for a table rebuild; the ids are copied as they are.

Revision ID: 0008
Revises: 0007
"""
from alembic import op
import sqlalchemy as sa

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None

RUN_KEY = ["campaign_id", "solver_id", "instance_id", "seed", "replicate"]


def _imports(sha_unique: bool, with_replaces: bool) -> sa.Table:
    """The imports table as revision 0004 left it, with or without this revision's changes."""
    cols = [
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("campaign_id", sa.Integer, sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("file_name", sa.Text, nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False, unique=sha_unique),
        sa.Column("layout", sa.Text, nullable=False, server_default=""),
        sa.Column("rows_read", sa.Integer, nullable=False),
        sa.Column("rows_loaded", sa.Integer, nullable=False),
        sa.Column("rows_rejected", sa.Integer, nullable=False),
        sa.Column("rows_skipped", sa.Integer, nullable=False, server_default="0"),
        sa.Column("loaded_at", sa.BigInteger, nullable=False),
        sa.Column("tool_version", sa.String(32), nullable=False),
        sa.Column("first_run_id", sa.BigInteger, nullable=True),
        sa.Column("last_run_id", sa.BigInteger, nullable=True),
        sa.Column("first_finished", sa.BigInteger, nullable=True),
        sa.Column("last_finished", sa.BigInteger, nullable=True),
    ]
    if with_replaces:
        cols.append(sa.Column("replaces_import_id", sa.Integer, sa.ForeignKey("imports.id", name="fk_imports_replaces"), nullable=True))
    return sa.Table("imports", sa.MetaData(), *cols)


def upgrade() -> None:
    sqlite = op.get_bind().dialect.name == "sqlite"
    if sqlite:
        # copy_from gives the shape to rebuild from (the old one less its UNIQUE), not a reflection
        with op.batch_alter_table("imports", recreate="always", copy_from=_imports(False, False)) as batch:
            batch.add_column(sa.Column("replaces_import_id", sa.Integer, sa.ForeignKey("imports.id", name="fk_imports_replaces"), nullable=True))
    else:
        op.drop_constraint("imports_sha256_key", "imports", type_="unique")
        op.add_column("imports", sa.Column("replaces_import_id", sa.Integer, sa.ForeignKey("imports.id", name="fk_imports_replaces"), nullable=True))
    op.create_index("ux_imports_reload", "imports", [sa.text("sha256"), sa.text("coalesce(replaces_import_id, 0)")],
                    unique=True)
    with op.batch_alter_table("analyses") as batch:
        batch.add_column(sa.Column("renewed_from_id", sa.Integer, sa.ForeignKey("analyses.id", name="fk_analyses_renewed_from"), nullable=True))
    if not sqlite:
        op.drop_index("ux_runs_key", "runs")
        op.create_index("ux_runs_key", "runs", RUN_KEY, unique=True, postgresql_where=sa.text("retraction_id IS NULL"))


def downgrade() -> None:
    if op.get_bind().dialect.name != "sqlite":
        # (refused by the server, and the downgrade with it, once a reload shares keys with its
        # retracted runs: 0007 holds a run once per campaign, retracted or not)
        op.drop_index("ux_runs_key", "runs")
        op.create_index("ux_runs_key", "runs", RUN_KEY, unique=True)
    with op.batch_alter_table("analyses") as batch:
        batch.drop_column("renewed_from_id")
    op.drop_index("ux_imports_reload", "imports")
    if op.get_bind().dialect.name == "sqlite":
        with op.batch_alter_table("imports", recreate="always", copy_from=_imports(True, False)):
            pass
    else:
        op.drop_column("imports", "replaces_import_id")
        op.create_unique_constraint("imports_sha256_key", "imports", ["sha256"])
