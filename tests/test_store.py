"""The schema module and the migrations must describe the same database."""
from __future__ import annotations

import pytest
from sqlalchemy import text

from warehouse.errors import StorageError
from warehouse.store.connect import init_warehouse, migrations_dir, open_warehouse, upgrade_warehouse
from warehouse.store.schema import SCHEMA_REVISION, VALUE_COLUMNS, metadata


@pytest.mark.filterwarnings("ignore:.*expression-based index")  # compared by the test below
def test_migrations_build_the_schema_module(wh):
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext

    with wh.engine.connect() as conn:
        diff = compare_metadata(MigrationContext.configure(conn), metadata)
    # the one difference allowed: a new warehouse holds no metric value column until a metric
    # takes its slot (revision 0004); the module declares every slot
    import sqlite3

    from conftest import ON_POSTGRES

    missing = sorted(d[3].name for d in diff if d[0] == "add_column" and d[2] == "runs" and d[3].name[:1] == "v")
    others = [d for d in diff if not (d[0] == "add_column" and d[2] == "runs" and d[3].name[:1] == "v")]
    # and on SQLite the block-range index on id, which the module declares for PostgreSQL alone
    # (revision 0010; alembic's comparison does not read a DDL condition). Neither database
    # holds a run key on the whole table (revisions 0007 and 0013).
    if not ON_POSTGRES:
        assert sorted(d[1].name for d in others if d[0] == "add_index") == ["ix_runs_id"]
        others = [d for d in others if d[0] != "add_index"]
    else:
        # and on PostgreSQL the references a load writes, which the module declares for SQLite
        # alone (revisions 0009 and 0012), for the same reason
        fks = sorted((d[1].parent.name, d[1].column_keys[0]) for d in others if d[0] == "add_fk")
        assert fks == sorted([(t, f"{c}_id") for t in ("cell_stats", "runs")
                              for c in ("campaign", "host", "import", "instance", "solver")]
                             + [("block_stats", f"{c}_id") for c in ("campaign", "group", "import", "solver")])
        others = [d for d in others if d[0] != "add_fk"]
    assert others == []

    dropped = ON_POSTGRES or sqlite3.sqlite_version_info >= (3, 35)  # DROP COLUMN came with SQLite 3.35
    assert missing == (sorted(VALUE_COLUMNS) if dropped else [])


def test_a_metric_column_comes_with_the_first_metric_of_its_slot(cli, wh, tmp_path):
    from warehouse.store import value_columns

    with wh.engine.connect() as conn:
        assert value_columns.present(conn) == set()
    f = tmp_path / "a.csv"
    f.write_text("solver,group,instance,pallets,seconds\nstacker,g1,i1,3,1.5\n", encoding="utf-8")
    assert cli("load", str(f), "--campaign", "c").code == 0
    with wh.engine.connect() as conn:
        assert value_columns.present(conn) == {1, 2}
    # a refused file takes the column of its new metric away with it
    bad = tmp_path / "b.csv"
    bad.write_text("solver,group,instance,nodes\nstacker,g1,i3,7\nstacker,g1,i4,inf\n", encoding="utf-8")
    assert cli("load", str(bad), "--campaign", "c").code == 2
    with wh.engine.connect() as conn:
        assert value_columns.present(conn) == {1, 2}
        assert conn.execute(text("SELECT count(*) FROM metrics")).scalar() == 2
    good = tmp_path / "c.csv"
    good.write_text("solver,group,instance,nodes\nstacker,g1,i2,7\n", encoding="utf-8")
    assert cli("load", str(good), "--campaign", "c").code == 0
    with wh.engine.connect() as conn:
        assert value_columns.present(conn) == {1, 2, 3}
        # the runs stored before the column came read NULL there
        assert conn.execute(text("SELECT v1, v2, v3 FROM runs ORDER BY id")).all() == [(3.0, 1.5, None), (None, None, 7.0)]


def test_schema_revision_is_the_migrations_head():
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    assert ScriptDirectory.from_config(cfg).get_current_head() == SCHEMA_REVISION


def test_open_missing_warehouse_names_the_init_command(tmp_path):
    with pytest.raises(StorageError, match="blockyard init"):
        open_warehouse(str(tmp_path / "nope.db"))


def test_a_new_sqlite_warehouse_has_large_pages_and_wal(tmp_path):
    # SQLite's page size must be set before the first table is made (sqlite.org, PRAGMA
    # page_size; recalled from memory): init sets it, and WAL, on the new file
    import sqlite3

    from warehouse.store.connect import PAGE_BYTES

    wh = init_warehouse(str(tmp_path / "pages.db"))
    wh.close()
    con = sqlite3.connect(str(tmp_path / "pages.db"))
    try:
        assert con.execute("PRAGMA page_size").fetchone()[0] == PAGE_BYTES == 16384
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    finally:
        con.close()


def test_init_refuses_an_existing_warehouse(location):
    with pytest.raises(StorageError, match="already"):
        init_warehouse(location)


def test_older_schema_names_the_upgrade_command_and_upgrade_keeps_rows(wh_location, tmp_path):
    from conftest import ON_POSTGRES

    init_warehouse(wh_location, revision="0001").close()
    with pytest.raises(StorageError, match="blockyard upgrade"):
        open_warehouse(wh_location)
    wh, old, backup = upgrade_warehouse(wh_location)
    assert old == "0001"
    if not ON_POSTGRES:
        assert backup is not None
    with wh.engine.connect() as c:
        assert c.execute(text("SELECT version_num FROM alembic_version")).scalar() == SCHEMA_REVISION
    wh.close()
    open_warehouse(wh_location).close()


def test_the_reload_guard_index_is_built_with_its_expression(wh):
    # alembic's comparison skips expression indexes (it says so in a warning), so read the DDL
    # the migrations made: a file is loaded once as a first load, each import replaced once
    from conftest import ON_POSTGRES

    with wh.engine.connect() as conn:
        if ON_POSTGRES:
            ddl = conn.execute(text("SELECT indexdef FROM pg_indexes WHERE indexname = 'ux_imports_reload'")).scalar()
        else:
            ddl = conn.execute(text("SELECT sql FROM sqlite_master WHERE name = 'ux_imports_reload'")).scalar()
    assert ddl is not None and "UNIQUE" in ddl.upper()
    assert "sha256" in ddl and "coalesce(replaces_import_id, 0)" in ddl.lower().replace('"', "")
