"""A large first load writes with SQLite's rollback journal and leaves the warehouse in WAL mode;
with another connection open it writes through WAL as always, and that connection reads on.

Facts used (SQLite documentation, "Write-Ahead Logging" and "PRAGMA journal_mode"): leaving WAL
mode needs the database to itself, and both journal modes are atomic."""
from __future__ import annotations

import sqlite3

import pytest

from conftest import ON_POSTGRES

from faults import runs_csv

pytestmark = pytest.mark.skipif(ON_POSTGRES, reason="SQLite's journal modes")

ROWS = 60_000  # at least the loader's BULK_MIN_ROWS


def _mode(path: str) -> str:
    con = sqlite3.connect(path)
    try:
        return con.execute("PRAGMA journal_mode").fetchone()[0].lower()
    finally:
        con.close()


def _count(path: str) -> int:
    con = sqlite3.connect(path)
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        return con.execute("SELECT count(*) FROM runs").fetchone()[0]
    finally:
        con.close()


def test_the_switch_is_made_alone_and_refused_with_company(location, tmp_path):
    from warehouse.store import bulk
    from warehouse.store.connect import open_warehouse

    assert bulk.BULK_MIN_ROWS <= ROWS
    wh = open_warehouse(location)
    try:
        with wh.write() as conn:
            with bulk.BulkJournal(conn, True, True, ROWS) as j:
                assert j.switched and _mode(location) == "delete"
            assert _mode(location) == "wal"
            other = sqlite3.connect(location)
            other.execute("SELECT count(*) FROM runs").fetchone()
            try:
                with bulk.BulkJournal(conn, True, True, ROWS) as j:
                    assert not j.switched and _mode(location) == "wal"
            finally:
                other.close()
            # a warehouse holding more runs than the file: no switch
            with bulk.BulkJournal(conn, True, True, -1) as j:
                assert not j.switched
    finally:
        wh.close()


def test_a_large_first_load_leaves_every_run_and_wal_mode(cli, location, tmp_path):
    f = runs_csv(tmp_path / "big.csv", ROWS)
    r = cli("load", str(f), "--campaign", "c", "--json")
    assert r.code == 0, r
    assert r.json()["imports"][0]["rows_loaded"] == ROWS
    assert _mode(location) == "wal"
    assert _count(location) == ROWS


def test_with_a_reader_open_the_load_goes_through_wal_and_the_reader_reads_on(cli, location, tmp_path):
    small = runs_csv(tmp_path / "small.csv", 100, seed=3)
    assert cli("load", str(small), "--campaign", "c").code == 0
    reader = sqlite3.connect(location, isolation_level=None)
    try:
        reader.execute("BEGIN")
        assert reader.execute("SELECT count(*) FROM runs").fetchone()[0] == 100
        big = runs_csv(tmp_path / "big.csv", ROWS, seed=4)
        r = cli("load", str(big), "--campaign", "d", "--json")
        assert r.code == 0, r
        # the reader's snapshot stays as it was while the load commits (WAL), then it sees the load
        assert reader.execute("SELECT count(*) FROM runs").fetchone()[0] == 100
        reader.execute("COMMIT")
        assert reader.execute("SELECT count(*) FROM runs").fetchone()[0] == 100 + ROWS
    finally:
        reader.close()
    assert _mode(location) == "wal"


def test_a_warehouse_left_in_rollback_mode_is_back_in_wal_after_any_load(cli, location, tmp_path):
    con = sqlite3.connect(location)
    assert con.execute("PRAGMA journal_mode = DELETE").fetchone()[0] == "delete"  # as a load killed mid-way leaves it
    con.close()
    small = runs_csv(tmp_path / "small.csv", 50, seed=5)
    assert cli("load", str(small), "--campaign", "c").code == 0
    assert _mode(location) == "wal"
    assert _count(location) == 50
