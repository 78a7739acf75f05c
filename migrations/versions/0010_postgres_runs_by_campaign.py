"""PostgreSQL: the runs table partitioned by campaign, one partition a campaign.

A load of a new campaign then fills a table of its own with no index and attaches it as the
campaign's partition, so its indexes are built by sorting once instead of kept row by row
(store/partitions.py; the measurements are in docs/performance.md). A slice of one campaign
reads that campaign's partition alone.

The primary key on runs.id goes: a key on a partitioned table must hold the partition column,
and every run id comes from the one load that holds the runs table's write lock (the largest
id plus one), as before. A block-range (BRIN) index on id keeps the lookups by an import's id
range and by id. The run key (live runs unique per campaign) and the retracted runs' index are made on
the parent, so every partition has them.

The runs are copied into the new table campaign by campaign, in one transaction: an upgrade
killed half-way leaves revision 0009 whole. SQLite keeps its one table: nothing changes there.

Revision ID: 0010
Revises: 0009
"""
from alembic import op
import sqlalchemy as sa

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None

RUN_KEY = "campaign_id, solver_id, instance_id, seed, replicate"


def _indexes() -> None:
    op.execute(f"CREATE UNIQUE INDEX ux_runs_key ON runs ({RUN_KEY}) WHERE retraction_id IS NULL")
    op.execute("CREATE INDEX ix_runs_withdrawn ON runs (retraction_id) WHERE retraction_id IS NOT NULL")
    op.execute("ALTER TABLE runs ADD CONSTRAINT runs_retraction_id_fkey FOREIGN KEY (retraction_id) "
               "REFERENCES retractions (id)")


# Making a table and attaching it as a partition are the owner's rights; a team member who may
# load (INSERT on runs, docs/reliability.md) gets them through these two functions, which run
# as the schema's owner and do nothing else. (String concatenation, not format(): no percent
# sign reaches the driver.)
OPEN = """
CREATE FUNCTION blockyard_open_partition(cid integer, attach_now boolean) RETURNS text
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
        EXECUTE 'GRANT SELECT, INSERT ON ' || quote_ident(t) || ' TO ' || quote_ident(session_user);
    END IF;
    RETURN t;
END
$body$
"""

ATTACH = """
CREATE FUNCTION blockyard_attach_partition(cid integer) RETURNS void
LANGUAGE plpgsql SECURITY DEFINER SET search_path = {schema}, pg_temp AS $body$
DECLARE
    t text := 'runs_c' || cid;
    col name;
BEGIN
    IF NOT has_table_privilege(session_user, 'runs', 'INSERT') THEN
        RAISE EXCEPTION 'permission denied for table runs' USING ERRCODE = '42501';
    END IF;
    FOR col IN SELECT a.attname FROM pg_attribute a WHERE a.attrelid = 'runs'::regclass AND a.attnum > 0
            AND NOT a.attisdropped AND NOT EXISTS (SELECT 1 FROM pg_attribute b
                WHERE b.attrelid = quote_ident(t)::regclass AND b.attname = a.attname AND NOT b.attisdropped) LOOP
        EXECUTE 'ALTER TABLE ' || quote_ident(t) || ' ADD COLUMN ' || quote_ident(col) || ' double precision';
    END LOOP;
    EXECUTE 'ALTER TABLE runs ATTACH PARTITION ' || quote_ident(t) || ' FOR VALUES IN (' || cid || ')';
END
$body$
"""


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    op.execute("ALTER TABLE runs RENAME TO runs_0009")
    op.execute("CREATE TABLE runs (LIKE runs_0009 INCLUDING DEFAULTS) PARTITION BY LIST (campaign_id)")
    for (cid,) in bind.execute(sa.text("SELECT DISTINCT campaign_id FROM runs_0009 ORDER BY 1")):
        op.execute(f"CREATE TABLE runs_c{int(cid)} PARTITION OF runs FOR VALUES IN ({int(cid)})")
        op.execute(f"ALTER TABLE runs_c{int(cid)} ADD CONSTRAINT runs_c{int(cid)}_campaign "
                   f"CHECK (campaign_id = {int(cid)})")
    op.execute("INSERT INTO runs SELECT * FROM runs_0009 ORDER BY id")
    op.execute("DROP TABLE runs_0009")
    # a block-range index: a load writes its ids in rising order, so each range of 16 pages holds
    # a narrow band of ids; built in a tenth of a B-tree's time when a partition is attached
    op.execute("CREATE INDEX ix_runs_id ON runs USING brin (id) WITH (pages_per_range = 16)")
    _indexes()
    schema = bind.exec_driver_sql("SELECT quote_ident(current_schema())").scalar()
    bind.exec_driver_sql(OPEN.replace("{schema}", schema))
    bind.exec_driver_sql(ATTACH.replace("{schema}", schema))


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    op.execute("DROP FUNCTION blockyard_open_partition(integer, boolean)")
    op.execute("DROP FUNCTION blockyard_attach_partition(integer)")
    op.execute("ALTER TABLE runs RENAME TO runs_0010")
    op.execute("CREATE TABLE runs (LIKE runs_0010 INCLUDING DEFAULTS)")
    op.execute("INSERT INTO runs SELECT * FROM runs_0010 ORDER BY id")
    op.execute("DROP TABLE runs_0010")  # (its partitions go with it)
    op.execute("ALTER TABLE runs ADD PRIMARY KEY (id)")
    _indexes()
