"""The ledger: stored analyses and the claims people stand behind.

Revision ID: 0002
Revises: 0001
"""
from alembic import op
import sqlalchemy as sa

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "analyses",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("kind", sa.String(32), nullable=False),
        sa.Column("slice_text", sa.Text, nullable=False),
        sa.Column("slice_parsed", sa.Text, nullable=False),
        sa.Column("metric", sa.String(255), nullable=False, server_default=""),
        sa.Column("settings", sa.Text, nullable=False),
        sa.Column("observations", sa.Text, nullable=False),
        sa.Column("max_run_id", sa.BigInteger, nullable=False, server_default="0"),
        sa.Column("fingerprint", sa.String(64), nullable=False),
        sa.Column("result", sa.Text, nullable=False),
        sa.Column("result_digest", sa.String(64), nullable=False),
        sa.Column("software", sa.Text, nullable=False),
        sa.Column("created_at", sa.BigInteger, nullable=False),
    )
    op.create_table(
        "claims",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("analysis_id", sa.Integer, sa.ForeignKey("analyses.id"), nullable=False),
        sa.Column("text", sa.Text, nullable=False),
        sa.Column("tags", sa.Text, nullable=False, server_default=""),
        sa.Column("created_at", sa.BigInteger, nullable=False),
    )


def downgrade() -> None:
    op.drop_table("claims")
    op.drop_table("analyses")
