"""PostgreSQL: the cell summaries partitioned by campaign, a new campaign's indexed once filled.

A load writes one cell row per import, solver, instance, host and metric slot (102,000 for a
510,000-run file), and the server kept cell_stats' three indexes up to date entry by entry, a
WAL record for each: 0.21 of the 0.28 s those rows took. A load of a new campaign now fills a
table of its own with no index (`blockyard_open_cells`, called beside the runs' own
`blockyard_open_partition`), builds its three indexes by sorting once it is full and attaches it
as the campaign's partition (`blockyard_attach_cells`): 0.09 s for the same rows
(docs/performance.md). A load into a campaign that holds runs writes through the parent into
the campaign's partition, as before. Every campaign the warehouse holds gets its partition now,
its rows copied over, and its statistics (the old table's are gone with it).

The parent keeps the indexes' names (ix_cells_campaign, ix_cells_solver, ix_cells_import); each
partition's are attached to them. The grants on cell_stats are carried to the new table.

Revision ID: 0014
Revises: 0013
"""
from alembic import op
import sqlalchemy as sa

revision = "0014"
down_revision = "0013"
branch_labels = None
depends_on = None

STATISTICS = "campaign_id, import_id, solver_id, instance_id, host_id, slot"
INDEXES = (("ix_cells_campaign", "campaign", "campaign_id, slot, solver_id, instance_id"),
           ("ix_cells_solver", "solver", "solver_id, slot, instance_id"),
           ("ix_cells_import", "import", "import_id"))

# Making, indexing and attaching a table are the owner's rights: a team member who may write
# cell summaries (INSERT on cell_stats) gets them through these two functions, which run as the
# schema's owner and do nothing else.
HEAD = """LANGUAGE plpgsql SECURITY DEFINER SET search_path = {schema}, pg_temp AS $body$
DECLARE
    t text := 'cells_c' || cid;
BEGIN
    IF NOT has_table_privilege(session_user, 'cell_stats', 'INSERT') THEN
        RAISE EXCEPTION 'permission denied for table cell_stats' USING ERRCODE = '42501';
    END IF;
"""

OPEN = """
CREATE FUNCTION blockyard_open_cells(cid integer, attach_now boolean) RETURNS text
{head}    IF to_regclass(quote_ident(t)) IS NOT NULL THEN
        RETURN NULL;
    END IF;
    EXECUTE 'CREATE TABLE ' || quote_ident(t) || ' (LIKE cell_stats INCLUDING DEFAULTS, CONSTRAINT '
        || quote_ident(t || '_campaign') || ' CHECK (campaign_id = ' || cid || '))';
    IF attach_now THEN
        EXECUTE 'ALTER TABLE cell_stats ATTACH PARTITION ' || quote_ident(t) || ' FOR VALUES IN (' || cid || ')';
    ELSE
        EXECUTE 'GRANT SELECT, INSERT ON ' || quote_ident(t) || ' TO ' || quote_ident(session_user);
    END IF;
    RETURN t;
END
$body$
"""

ATTACH = """
CREATE FUNCTION blockyard_attach_cells(cid integer) RETURNS void
{head}    IF to_regclass(quote_ident(t)) IS NULL OR (SELECT relispartition FROM pg_class
            WHERE oid = to_regclass(quote_ident(t))) THEN
        RETURN;
    END IF;
    {indexes}
    EXECUTE 'ALTER TABLE cell_stats ATTACH PARTITION ' || quote_ident(t) || ' FOR VALUES IN (' || cid || ')';
END
$body$
"""


def _functions(bind) -> None:
    schema = bind.exec_driver_sql("SELECT quote_ident(current_schema())").scalar()
    build = "\n    ".join(f"EXECUTE 'CREATE INDEX ' || quote_ident(t || '_{short}') || ' ON ' || quote_ident(t) "
                          f"|| ' ({cols})';" for _, short, cols in INDEXES)
    bind.exec_driver_sql(OPEN.replace("{head}", HEAD).replace("{schema}", schema))
    bind.exec_driver_sql(ATTACH.replace("{head}", HEAD).replace("{schema}", schema).replace("{indexes}", build))


def _grants(bind, old: str) -> list[tuple[str, str]]:
    """The privileges others hold on the table about to be replaced (its owner's come with it)."""
    return bind.execute(sa.text(
        "SELECT grantee, privilege_type FROM information_schema.role_table_grants "
        "WHERE table_schema = current_schema() AND table_name = :t "
        "AND grantee <> (SELECT tableowner FROM pg_tables WHERE schemaname = current_schema() "
        "AND tablename = :t)"), {"t": old}).all()


def _grant(grants: list[tuple[str, str]]) -> None:
    for grantee, privilege in grants:
        who = "PUBLIC" if grantee == "PUBLIC" else '"' + grantee.replace('"', '""') + '"'
        op.execute(f"GRANT {privilege} ON cell_stats TO {who}")


def _indexes() -> None:
    for name, _, cols in INDEXES:
        op.execute(f"CREATE INDEX {name} ON cell_stats ({cols})")


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    grants = _grants(bind, "cell_stats")
    for name, _, _ in INDEXES:
        op.execute(f"DROP INDEX {name}")
    op.execute("ALTER TABLE cell_stats RENAME TO cell_stats_0013")
    op.execute("CREATE TABLE cell_stats (LIKE cell_stats_0013 INCLUDING DEFAULTS) PARTITION BY LIST (campaign_id)")
    campaigns = bind.execute(sa.text("SELECT id FROM campaigns UNION SELECT DISTINCT campaign_id FROM cell_stats_0013 "
                                     "ORDER BY 1")).scalars().all()
    for cid in campaigns:
        op.execute(f"CREATE TABLE cells_c{int(cid)} PARTITION OF cell_stats FOR VALUES IN ({int(cid)})")
        op.execute(f"ALTER TABLE cells_c{int(cid)} ADD CONSTRAINT cells_c{int(cid)}_campaign "
                   f"CHECK (campaign_id = {int(cid)})")
    op.execute("INSERT INTO cell_stats SELECT * FROM cell_stats_0013 ORDER BY import_id, slot, solver_id, instance_id")
    op.execute("DROP TABLE cell_stats_0013")
    _indexes()
    _grant(grants)
    _functions(bind)
    for cid in campaigns:  # the planner's statistics, as a load leaves them (store/cells.refresh_statistics)
        op.execute(f"ANALYZE cells_c{int(cid)} ({STATISTICS})")


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    op.execute("DROP FUNCTION blockyard_attach_cells(integer)")
    op.execute("DROP FUNCTION blockyard_open_cells(integer, boolean)")
    grants = _grants(bind, "cell_stats")
    op.execute("ALTER TABLE cell_stats RENAME TO cell_stats_0014")
    for name, _, _ in INDEXES:  # (the partitions' indexes go with the parent's)
        op.execute(f"DROP INDEX {name}")
    op.execute("CREATE TABLE cell_stats (LIKE cell_stats_0014 INCLUDING DEFAULTS)")
    op.execute("INSERT INTO cell_stats SELECT * FROM cell_stats_0014 ORDER BY import_id, slot, solver_id, instance_id")
    op.execute("DROP TABLE cell_stats_0014")  # (its partitions go with it)
    _indexes()
    _grant(grants)
    op.execute(f"ANALYZE cell_stats ({STATISTICS})")
