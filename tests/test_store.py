"""The schema module and the migrations must describe the same database."""
from __future__ import annotations

import pytest
from sqlalchemy import text

from warehouse.errors import StorageError
from warehouse.store.connect import init_warehouse, migrations_dir, open_warehouse, upgrade_warehouse
from warehouse.store.schema import SCHEMA_REVISION, metadata


def test_migrations_build_the_schema_module(wh):
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext

    with wh.engine.connect() as conn:
        diff = compare_metadata(MigrationContext.configure(conn), metadata)
    assert diff == []


def test_schema_revision_is_the_migrations_head():
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    assert ScriptDirectory.from_config(cfg).get_current_head() == SCHEMA_REVISION


def test_open_missing_warehouse_names_the_init_command(tmp_path):
    with pytest.raises(StorageError, match="blockyard init"):
        open_warehouse(str(tmp_path / "nope.db"))


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
