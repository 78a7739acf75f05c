"""PostgreSQL: the run key kept per campaign, made by the campaign's first load that needs it.

Revision 0010 put the run key (live runs unique per campaign) on the partitioned runs table, so
every partition carried it and the attach at the end of a new campaign's load built it by
sorting the whole table: 0.21 to 0.27 s of a 510,000-run load, for a key that load never asks,
since it proves its runs new from the file's key hashes before it commits (ingest/runkey.py,
as SQLite has since revision 0007; docs/performance.md).

The parent's key goes. Each campaign's partition gets a key of its own, on its solver, instance,
seed and replicate (the campaign is one value there), the first time a load into a campaign
that holds runs needs one to refuse a taken key (`blockyard_key_partition`, called by that
load, in its transaction). The partitions a warehouse holds now get theirs the same way, at
their next load: this upgrade builds nothing.

Revision ID: 0013
Revises: 0012
"""
from alembic import op
import sqlalchemy as sa

revision = "0013"
down_revision = "0012"
branch_labels = None
depends_on = None

# Making an index is the table owner's right: a team member who may load (INSERT on runs) gets
# it through this function, which runs as the schema's owner and does nothing else.
KEY = """
CREATE FUNCTION blockyard_key_partition(cid integer) RETURNS boolean
LANGUAGE plpgsql SECURITY DEFINER SET search_path = {schema}, pg_temp AS $body$
DECLARE
    t text := 'runs_c' || cid;
BEGIN
    IF NOT has_table_privilege(session_user, 'runs', 'INSERT') THEN
        RAISE EXCEPTION 'permission denied for table runs' USING ERRCODE = '42501';
    END IF;
    IF to_regclass(quote_ident(t)) IS NULL OR to_regclass(quote_ident(t || '_key')) IS NOT NULL THEN
        RETURN false;
    END IF;
    EXECUTE 'CREATE UNIQUE INDEX ' || quote_ident(t || '_key') || ' ON ' || quote_ident(t)
        || ' (solver_id, instance_id, seed, replicate) WHERE retraction_id IS NULL';
    RETURN true;
END
$body$
"""


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    op.execute("DROP INDEX ux_runs_key")  # (the partitions' copies go with it)
    schema = bind.exec_driver_sql("SELECT quote_ident(current_schema())").scalar()
    bind.exec_driver_sql(KEY.replace("{schema}", schema))


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    op.execute("DROP FUNCTION blockyard_key_partition(integer)")
    parts = bind.execute(sa.text("SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid "
                                 "WHERE i.inhparent = 'runs'::regclass")).scalars().all()
    for name in parts:
        op.execute(f'DROP INDEX IF EXISTS "{name}_key"')
    op.execute("CREATE UNIQUE INDEX ux_runs_key ON runs (campaign_id, solver_id, instance_id, seed, replicate) "
               "WHERE retraction_id IS NULL")
