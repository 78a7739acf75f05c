"""PostgreSQL: run ids drawn from a sequence, so that loads of different campaigns run side by side.

Until now every run id was the largest stored id plus one, which only the one load holding the
runs table's write lock could know; loads therefore took turns. From here a load takes a block
of ids for its whole file at once from `runs_id_seq` (`blockyard_take_run_ids`), so each
import's ids stay one unbroken range that no other import's runs fall in (the ranges the slices
and `verify` read), and the load needs only the lock every writer of runs takes. Ids a refused
load took are not given again: the gaps are harmless (an import's id range may be wider than its
runs, never narrower).

Moving a sequence by more than one is the owner's right (setval); the function runs as the
schema's owner for anyone who may insert runs, holds a session-level advisory lock for the two
statements (so two loads never take overlapping blocks), and does nothing else. SQLite keeps its
one writer and the largest id plus one: nothing changes there.

Revision ID: 0011
Revises: 0010
"""
from alembic import op

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None

# the advisory lock held while a block of ids is taken: a class of ours (store/connect.py lists
# them) and the schema, as each schema is a warehouse of its own
TAKE = """
CREATE FUNCTION blockyard_take_run_ids(n bigint) RETURNS bigint
LANGUAGE plpgsql SECURITY DEFINER SET search_path = {schema}, pg_temp AS $body$
DECLARE
    first bigint;
BEGIN
    IF NOT has_table_privilege(session_user, 'runs', 'INSERT') THEN
        RAISE EXCEPTION 'permission denied for table runs' USING ERRCODE = '42501';
    END IF;
    IF n < 1 THEN
        RAISE EXCEPTION 'a block of run ids holds at least one id' USING ERRCODE = '22023';
    END IF;
    PERFORM pg_advisory_lock(7205514, hashtext(current_schema()));
    first := nextval('runs_id_seq');
    IF n > 1 THEN
        PERFORM setval('runs_id_seq', first + n - 1);
    END IF;
    PERFORM pg_advisory_unlock(7205514, hashtext(current_schema()));
    RETURN first;
END
$body$
"""


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    last = bind.exec_driver_sql("SELECT coalesce(max(id), 0) FROM runs").scalar()
    op.execute(f"CREATE SEQUENCE runs_id_seq AS bigint START WITH {int(last) + 1}")
    schema = bind.exec_driver_sql("SELECT quote_ident(current_schema())").scalar()
    bind.exec_driver_sql(TAKE.replace("{schema}", schema))


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "sqlite":
        return
    op.execute("DROP FUNCTION blockyard_take_run_ids(bigint)")
    op.execute("DROP SEQUENCE runs_id_seq")
