"""Shared fixtures: every test gets its own real warehouse.

By default a fresh SQLite file; with BLOCKYARD_TEST_URL=postgresql://... each test gets its own
schema on that server (dropped afterwards), so runs never collide.
"""
from __future__ import annotations

import io
import os
import uuid
from pathlib import Path

import pytest

TEST_URL = os.environ.get("BLOCKYARD_TEST_URL", "")
# a resident process the developer has running must not serve the tests' commands
# (tests/test_resident.py starts its own, in a folder of its own)
os.environ["BLOCKYARD_RESIDENT"] = "off"
ON_POSTGRES = TEST_URL.startswith("postgres")


# The statistics tests (tests/analyze) never open a warehouse: the PostgreSQL pass would run the
# very same computations again, so it leaves them to the SQLite pass.
DATABASE_FREE = [Path(__file__).parent / "analyze"]


def pytest_collection_modifyitems(config, items):
    if not ON_POSTGRES:
        return
    skip = pytest.mark.skip(reason="no warehouse in these tests: they run in the SQLite pass")
    for item in items:
        if any(item.path.is_relative_to(folder) for folder in DATABASE_FREE):
            item.add_marker(skip)


def _pg_location(schema: str) -> str:
    sep = "&" if "?" in TEST_URL else "?"
    return f"{TEST_URL}{sep}options=-csearch_path%3D{schema}"


@pytest.fixture
def wh_location(tmp_path):
    """Where a fresh, empty (not yet initialised) warehouse for this test lives."""
    if not ON_POSTGRES:
        yield str(tmp_path / "test.db")
        return
    from sqlalchemy import create_engine, text

    schema = "t_" + uuid.uuid4().hex[:12]
    admin = create_engine(TEST_URL.replace("postgresql://", "postgresql+psycopg://", 1))
    with admin.begin() as c:
        c.execute(text(f'CREATE SCHEMA "{schema}"'))
    try:
        yield _pg_location(schema)
    finally:
        with admin.begin() as c:
            c.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


@pytest.fixture
def location(wh_location):
    """An initialised, empty warehouse (built through the migrations)."""
    from warehouse.store.connect import init_warehouse

    init_warehouse(wh_location).close()
    return wh_location


@pytest.fixture
def wh(location):
    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    yield w
    w.close()


class CliResult:
    def __init__(self, code: int, out: str, err: str):
        self.code, self.out, self.err = code, out, err

    def json(self):
        import json

        return json.loads(self.out)

    def __repr__(self):
        return f"CliResult(code={self.code}, out={self.out[:400]!r}, err={self.err[:400]!r})"


@pytest.fixture
def cli(location):
    """Run a blockyard command in-process against this test's warehouse."""
    from warehouse.front.cli import run

    def _run(*argv: str, warehouse: str | None = None) -> CliResult:
        out, err = io.StringIO(), io.StringIO()
        code = run(["-w", warehouse or location, *argv], out=out, err=err)
        return CliResult(code, out.getvalue(), err.getvalue())

    return _run


def run_counts(location: str) -> dict:
    from warehouse.select.inventory import counts
    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    try:
        with w.engine.connect() as c:
            return counts(c)
    finally:
        w.close()


def load_rows(cli, tmp_path, runs: list[dict], header: list[str], layout: str, name: str, campaign: str) -> None:
    """Write runs as a CSV file with a layout beside it and load them through the command line."""
    import csv

    path = tmp_path / name
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=header)
        w.writeheader()
        w.writerows(runs)
    lay = tmp_path / "layout.toml"
    lay.write_text(layout)
    r = cli("load", str(path), "--campaign", campaign, "--layout", str(lay))
    assert r.code == 0, r
