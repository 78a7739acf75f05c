"""Cell summaries: per import, solver, instance, host and metric slot, the sums of live runs.

Revision ID: 0003
Revises: 0002
"""
from alembic import op
import sqlalchemy as sa

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "cell_stats",
        sa.Column("campaign_id", sa.Integer, sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("import_id", sa.Integer, sa.ForeignKey("imports.id"), nullable=False),
        sa.Column("solver_id", sa.Integer, sa.ForeignKey("solvers.id"), nullable=False),
        sa.Column("instance_id", sa.Integer, sa.ForeignKey("instances.id"), nullable=False),
        sa.Column("host_id", sa.Integer, sa.ForeignKey("hosts.id"), nullable=True),
        sa.Column("slot", sa.SmallInteger, nullable=False),
        sa.Column("n", sa.BigInteger, nullable=False),
        sa.Column("n_ok", sa.BigInteger, nullable=False),
        sa.Column("sum_ok", sa.Float, nullable=True),
        sa.Column("sq_ok", sa.Float, nullable=True),
        sa.Column("min_ok", sa.Float, nullable=True),
        sa.Column("max_ok", sa.Float, nullable=True),
        sa.Column("n_fail", sa.BigInteger, nullable=False),
        sa.Column("n_fail_v", sa.BigInteger, nullable=False),
        sa.Column("sum_fail_v", sa.Float, nullable=True),
        sa.Column("id_sum", sa.BigInteger, nullable=False),
        sa.Column("id_max", sa.BigInteger, nullable=False),
    )
    op.create_index("ix_cells_campaign", "cell_stats", ["campaign_id", "slot", "solver_id", "instance_id"])
    op.create_index("ix_cells_solver", "cell_stats", ["solver_id", "slot", "instance_id"])
    op.create_index("ix_cells_import", "cell_stats", ["import_id", "solver_id", "instance_id"])
    # slices by solver and instance are answered by the cell summaries now; the runs keep only the
    # unique key (campaign, solver, instance, seed, replicate) and the time index, which loads faster
    op.drop_index("ix_runs_solver_instance", "runs")
    op.create_index("ix_runs_withdrawn", "runs", ["retraction_id"],
                    sqlite_where=sa.text("retraction_id IS NOT NULL"), postgresql_where=sa.text("retraction_id IS NOT NULL"))
    # a warehouse upgraded from 0002 gets its summaries from the runs it already holds
    conn = op.get_bind()
    slots = [r[0] for r in conn.execute(sa.text("SELECT slot FROM metrics"))]
    for slot in slots:
        v = f"v{int(slot)}"
        conn.execute(sa.text(
            "INSERT INTO cell_stats (campaign_id, import_id, solver_id, instance_id, host_id, slot, n, n_ok, sum_ok,"
            " sq_ok, min_ok, max_ok, n_fail, n_fail_v, sum_fail_v, id_sum, id_max)"
            f" SELECT campaign_id, import_id, solver_id, instance_id, host_id, {int(slot)}, count(*),"
            f" sum(CASE WHEN status = 0 AND {v} IS NOT NULL THEN 1 ELSE 0 END),"
            f" sum(CASE WHEN status = 0 THEN {v} END), sum(CASE WHEN status = 0 THEN {v} * {v} END),"
            f" min(CASE WHEN status = 0 THEN {v} END), max(CASE WHEN status = 0 THEN {v} END),"
            " sum(CASE WHEN status <> 0 THEN 1 ELSE 0 END),"
            f" sum(CASE WHEN status <> 0 AND {v} IS NOT NULL THEN 1 ELSE 0 END),"
            f" sum(CASE WHEN status <> 0 THEN {v} END), sum(id), max(id)"
            " FROM runs WHERE retraction_id IS NULL"
            " GROUP BY campaign_id, import_id, solver_id, instance_id, host_id"))


def downgrade() -> None:
    op.drop_index("ix_runs_withdrawn", "runs")
    op.create_index("ix_runs_solver_instance", "runs", ["solver_id", "instance_id"])
    op.drop_table("cell_stats")
