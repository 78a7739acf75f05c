"""PostgreSQL: no per-row reference checks on the block summaries; a new campaign's table made
with the retracted runs' index already on it.

block_stats referred to campaigns, imports, solvers and groups through foreign keys, which
PostgreSQL checks with a trigger per row and per key: 3,400 block rows of a 510,000-run load
took 67 ms to COPY with them and 9 ms without (docs/performance.md). As for runs and cell_stats
(revision 0009), every id a load writes there comes from its own transaction, and `blockyard
verify` finds an id with nothing behind it (store/audit.py). SQLite keeps the constraints.

The table a load of a new campaign fills (revision 0010's blockyard_open_partition) is now made
with the index of retracted runs on it: that index holds only rows with a retraction, so a load
adds nothing to it, and the attach at the load's end takes it as the partition's index instead
of reading the whole table to build it (35 ms of a 510,000-run load).

Revision ID: 0012
Revises: 0011
"""
from alembic import op

revision = "0012"
down_revision = "0011"
branch_labels = None
depends_on = None

BLOCK_KEYS = {"campaign_id": "campaigns", "import_id": "imports", "solver_id": "solvers", "group_id": "groups"}

# revision 0010's function, with the one line more (String concatenation, not format(): no
# percent sign reaches the driver.)
OPEN = """
CREATE OR REPLACE FUNCTION blockyard_open_partition(cid integer, attach_now boolean) RETURNS text
LANGUAGE plpgsql SECURITY DEFINER SET search_path = {schema}, pg_temp AS $body$
DECLARE
    t text := 'runs_c' || cid;
BEGIN
    IF NOT has_table_privilege(session_user, 'runs', 'INSERT') THEN
        RAISE EXCEPTION 'permission denied for table runs' USING ERRCODE = '42501';
    END IF;
    IF to_regclass(quote_ident(t)) IS NOT NULL THEN
        RETURN NULL;
    END IF;
    EXECUTE 'CREATE TABLE ' || quote_ident(t) || ' (LIKE runs INCLUDING DEFAULTS, CONSTRAINT '
        || quote_ident(t || '_campaign') || ' CHECK (campaign_id = ' || cid || '))';
    IF attach_now THEN
        EXECUTE 'ALTER TABLE runs ATTACH PARTITION ' || quote_ident(t) || ' FOR VALUES IN (' || cid || ')';
    ELSE
        {withdrawn}
        EXECUTE 'GRANT SELECT, INSERT ON ' || quote_ident(t) || ' TO ' || quote_ident(session_user);
    END IF;
    RETURN t;
END
$body$
"""

WITHDRAWN = ("EXECUTE 'CREATE INDEX ' || quote_ident(t || '_withdrawn') || ' ON ' || quote_ident(t) "
             "|| ' (retraction_id) WHERE retraction_id IS NOT NULL';")


def _open(bind, withdrawn: str) -> None:
    schema = bind.exec_driver_sql("SELECT quote_ident(current_schema())").scalar()
    bind.exec_driver_sql(OPEN.replace("{schema}", schema).replace("{withdrawn}", withdrawn))


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    import sqlalchemy as sa

    for fk in sa.inspect(bind).get_foreign_keys("block_stats"):
        if fk["constrained_columns"] and fk["constrained_columns"][0] in BLOCK_KEYS and fk["name"]:
            op.drop_constraint(fk["name"], "block_stats", type_="foreignkey")
    _open(bind, WITHDRAWN)


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    _open(bind, "")
    for col, parent in BLOCK_KEYS.items():
        op.create_foreign_key(f"block_stats_{col}_fkey", "block_stats", parent, [col], ["id"])
