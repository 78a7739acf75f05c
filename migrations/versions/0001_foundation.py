"""Foundation: campaigns, imports, solvers, families, groups, instances, metrics, hosts, runs.

Revision ID: 0001
Revises:
"""
from alembic import op
import sqlalchemy as sa

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

NAME = 255


def _id64():
    return sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "campaigns",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String(NAME), nullable=False, unique=True),
        sa.Column("description", sa.Text, nullable=False, server_default=""),
        sa.Column("notes", sa.Text, nullable=False, server_default=""),
        sa.Column("created_at", sa.BigInteger, nullable=False),
    )
    op.create_table(
        "imports",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("campaign_id", sa.Integer, sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("file_name", sa.Text, nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False, unique=True),
        sa.Column("layout", sa.Text, nullable=False, server_default=""),
        sa.Column("rows_read", sa.Integer, nullable=False),
        sa.Column("rows_loaded", sa.Integer, nullable=False),
        sa.Column("rows_rejected", sa.Integer, nullable=False),
        sa.Column("rows_skipped", sa.Integer, nullable=False, server_default="0"),
        sa.Column("loaded_at", sa.BigInteger, nullable=False),
        sa.Column("tool_version", sa.String(32), nullable=False),
    )
    op.create_table(
        "solvers",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String(NAME), nullable=False),
        sa.Column("version", sa.String(NAME), nullable=False, server_default=""),
        sa.Column("build", sa.String(NAME), nullable=False, server_default=""),
        sa.Column("params", sa.Text, nullable=False, server_default=""),
        sa.UniqueConstraint("name", "version", "build", "params", name="uq_solvers"),
    )
    op.create_table(
        "families",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String(NAME), nullable=False, unique=True),
    )
    op.create_table(
        "groups",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("family_id", sa.Integer, sa.ForeignKey("families.id"), nullable=False),
        sa.Column("name", sa.String(NAME), nullable=False),
        sa.UniqueConstraint("family_id", "name", name="uq_groups"),
    )
    op.create_table(
        "instances",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("group_id", sa.Integer, sa.ForeignKey("groups.id"), nullable=False),
        sa.Column("name", sa.String(NAME), nullable=False),
        sa.Column("content_hash", sa.String(NAME), nullable=False, server_default=""),
        sa.Column("attributes", sa.Text, nullable=False, server_default=""),
        sa.UniqueConstraint("group_id", "name", "content_hash", name="uq_instances"),
    )
    op.create_table(
        "metrics",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String(NAME), nullable=False, unique=True),
        sa.Column("unit", sa.String(NAME), nullable=False, server_default=""),
        sa.Column("sense", sa.String(3), nullable=False, server_default="min"),
        sa.Column("slot", sa.Integer, nullable=False, unique=True),
    )
    op.create_table(
        "hosts",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String(NAME), nullable=False, unique=True),
    )
    op.create_table(
        "retractions",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("slice", sa.Text, nullable=False),
        sa.Column("reason", sa.Text, nullable=False),
        sa.Column("who", sa.String(NAME), nullable=False, server_default=""),
        sa.Column("at", sa.BigInteger, nullable=False),
        sa.Column("runs", sa.Integer, nullable=False, server_default="0"),
        sa.Column("undone_at", sa.BigInteger, nullable=True),
    )
    op.create_table(
        "runs",
        sa.Column("id", _id64(), primary_key=True, autoincrement=False),
        sa.Column("campaign_id", sa.Integer, sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("import_id", sa.Integer, sa.ForeignKey("imports.id"), nullable=False),
        sa.Column("solver_id", sa.Integer, sa.ForeignKey("solvers.id"), nullable=False),
        sa.Column("instance_id", sa.Integer, sa.ForeignKey("instances.id"), nullable=False),
        sa.Column("seed", sa.BigInteger, nullable=False),
        sa.Column("replicate", sa.Integer, nullable=False),
        sa.Column("status", sa.SmallInteger, nullable=False),
        sa.Column("finished_at", sa.BigInteger, nullable=True),
        sa.Column("host_id", sa.Integer, sa.ForeignKey("hosts.id"), nullable=True),
        sa.Column("source_line", sa.Integer, nullable=False),
        sa.Column("retraction_id", sa.Integer, sa.ForeignKey("retractions.id"), nullable=True),
        # metric values, one column per metric slot (metrics.slot)
        *[sa.Column(f"v{i}", sa.Float, nullable=True) for i in range(1, 25)],
    )
    op.create_index("ux_runs_key", "runs", ["campaign_id", "solver_id", "instance_id", "seed", "replicate"], unique=True)
    op.create_index("ix_runs_solver_instance", "runs", ["solver_id", "instance_id"])
    op.create_index("ix_runs_finished", "runs", ["finished_at"])


def downgrade() -> None:
    for name in ("runs", "retractions", "hosts", "metrics", "instances", "groups",
                 "families", "solvers", "imports", "campaigns"):
        op.drop_table(name)
