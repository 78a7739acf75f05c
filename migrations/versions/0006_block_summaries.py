"""Block summaries: per import, metric slot, solver and group, the sums of the default collapse.

A slice of whole campaigns, treatments and blocks then collapses from a few hundred rows per
import instead of summing its cells again (100,000 for a night of the benchmark campaign). A
warehouse upgraded from 0005 gets them from the cell summaries it holds, import by import.

Revision ID: 0006
Revises: 0005
"""
from alembic import op
import sqlalchemy as sa

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "block_stats",
        sa.Column("campaign_id", sa.Integer, sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("import_id", sa.Integer, sa.ForeignKey("imports.id"), nullable=False),
        sa.Column("slot", sa.SmallInteger, nullable=False),
        sa.Column("solver_id", sa.Integer, sa.ForeignKey("solvers.id"), nullable=False),
        sa.Column("group_id", sa.Integer, sa.ForeignKey("groups.id"), nullable=False),
        *[sa.Column(name, sa.BigInteger, nullable=False)
          for name in ("n", "n_ok", "n_fail", "id_sum", "w_ids", "cells", "inst", "id_max", "lost", "vcells")],
        sa.Column("vsum", sa.Float, nullable=True),
        *[sa.Column(name, sa.BigInteger, nullable=False) for name in ("v_n", "v_fail", "v_ok", "group_valued")],
    )
    op.create_index("ix_blocks_campaign", "block_stats", ["campaign_id", "slot", "solver_id"])
    op.create_index("ix_blocks_import", "block_stats", ["import_id"])
    # the rows of the imports already stored, made by the same code the loader and retraction use
    from warehouse.store import blocks

    conn = op.get_bind()
    ids = [r[0] for r in conn.execute(sa.text("SELECT DISTINCT import_id FROM cell_stats"))]
    blocks.rebuild(conn, ids)


def downgrade() -> None:
    op.drop_index("ix_blocks_import", "block_stats")
    op.drop_index("ix_blocks_campaign", "block_stats")
    op.drop_table("block_stats")
