"""A warehouse that cannot take more: a full disk, a read-only file, a read-only folder, a
read-only server session.

Each time the user gets one line that says the warehouse cannot be written (no traceback, no
'internal error'), and nothing is half-written: the counts are those before and the file passes
SQLite's own checks.

A full disk is simulated with SQLite's page limit. SQLite documentation, PRAGMA max_page_count:
the limit is per connection, cannot be set below the current size, and a write that needs more
pages fails with SQLITE_FULL ("database or disk is full"). The limit is set on every connection
Blockyard opens to the test's file, through an SQLAlchemy pool event on the Engine class
(SQLAlchemy documentation, PoolEvents.connect: listeners on the Engine class apply to every engine).
"""
from __future__ import annotations

import contextlib
import os
import re
import sqlite3

import pytest
from sqlalchemy import event
from sqlalchemy.engine import Engine

from conftest import ON_POSTGRES

from . import (blockyard, cells_agree, in_process, one_line, runs_csv, sqlite_whole, table_counts,
               without_permission_override)

CANNOT_WRITE = re.compile(r"cannot (be )?writ|read-?only|full", re.IGNORECASE)
sqlite_only = pytest.mark.skipif(ON_POSTGRES, reason="a SQLite file: page limit and file modes")


@contextlib.contextmanager
def disk_full(path, spare_pages: int = 0):
    """Every new connection to this SQLite file may grow it by at most `spare_pages` pages."""
    target = os.path.realpath(path)

    def limit(dbapi_conn, _record):
        if not isinstance(dbapi_conn, sqlite3.Connection):
            return
        main = [row[2] for row in dbapi_conn.execute("PRAGMA database_list") if row[1] == "main"]
        if main and main[0] and os.path.realpath(main[0]) == target:
            pages = dbapi_conn.execute("PRAGMA page_count").fetchone()[0]
            dbapi_conn.execute(f"PRAGMA max_page_count = {pages + spare_pages}")

    event.listen(Engine, "connect", limit)
    try:
        yield
    finally:
        event.remove(Engine, "connect", limit)


@pytest.fixture
def stocked(cli, location, tmp_path):
    """A warehouse with one campaign (2 solvers x 20 blocks x 3 seeds) and one kept analysis."""
    res = cli("load", str(runs_csv(tmp_path / "base.csv", 6_000, seed=11)), "--campaign", "base")
    assert res.code == 0, res
    res = cli("blocktest", "--metric", "pallets", "--json")
    assert res.code == 0, res
    return res.json()["analysis_id"]


def unchanged(location, before: dict) -> None:
    assert table_counts(location) == before
    if not ON_POSTGRES:
        sqlite_whole(location)
    cells_agree(location)


def says_cannot_write(res) -> str:
    assert res.code in (1, 2), res  # the brief allows the code's own status; the line is what matters
    line = one_line(res.err)
    assert CANNOT_WRITE.search(line), line
    return line


# --- a full disk -------------------------------------------------------------------------------

@sqlite_only
@pytest.mark.parametrize("rows", [
    pytest.param(2_000, id="small-load"),
    pytest.param(60_000, id="large-load-indexes-set-aside"),
])
def test_a_load_onto_a_full_disk_is_refused_in_one_line(cli, location, tmp_path, stocked, rows):
    path = runs_csv(tmp_path / "more.csv", rows, seed=12)
    before = table_counts(location)
    with disk_full(location):
        res = cli("load", str(path), "--campaign", "more")
    line = says_cannot_write(res)
    assert str(path) in line
    unchanged(location, before)
    # once there is room again, the same file loads
    assert cli("load", str(path), "--campaign", "more").code == 0


@sqlite_only
def test_load_file_on_a_full_disk_raises_storage_error(location, tmp_path, stocked):
    from warehouse.errors import StorageError
    from warehouse.ingest.load import load_file
    from warehouse.store.connect import open_warehouse

    path = runs_csv(tmp_path / "more.csv", 3_000, seed=13)
    before = table_counts(location)
    wh = open_warehouse(location)
    try:
        pages = []

        @event.listens_for(wh.engine, "connect")
        def limit(dbapi_conn, _record):
            n = dbapi_conn.execute("PRAGMA page_count").fetchone()[0]
            pages.append(dbapi_conn.execute(f"PRAGMA max_page_count = {n}").fetchone()[0])

        wh.engine.dispose()  # connections opened before the listener would not have the limit
        with pytest.raises(StorageError, match="cannot write"):
            load_file(wh, path, "more")
        assert pages  # the limit did apply to the load's own connection
    finally:
        wh.close()
    unchanged(location, before)


WRITERS = {
    # what the command writes, made big enough that it cannot fit in pages the file already has
    "blocktest": lambda tmp, aid: ("blocktest", "--metric", "pallets", "--pairs"),
    "keep": lambda tmp, aid: ("keep", "x" * 50_000, "--analysis", str(aid)),
    "retract": lambda tmp, aid: ("retract", "--slice", "solver=packer", "--reason", "wrong build"),
}

FULL_DISK_WRITERS = [
    pytest.param(name, id=name)
    for name in WRITERS
]


@sqlite_only
@pytest.mark.parametrize("name", FULL_DISK_WRITERS)
def test_analyses_claims_and_retractions_on_a_full_disk(cli, location, tmp_path, stocked, name):
    before = table_counts(location)
    with disk_full(location):
        res = cli(*WRITERS[name](tmp_path, stocked))
    assert res.code in (0, 2), res
    if res.code == 2:
        says_cannot_write(res)
    else:
        assert "internal error" not in res.err and len(res.err.strip().splitlines()) <= 1, res
    unchanged(location, before)


# --- read-only storage -------------------------------------------------------------------------

def as_user(location, *argv):
    """The real command line in a process that file modes apply to (even when tests run as root)."""
    return blockyard(*argv, "-w", location, preexec_fn=without_permission_override())


@pytest.fixture
def closed(location, stocked):
    """The stocked warehouse with every connection closed: SQLite has folded its WAL back into the
    file and removed it (SQLite documentation, Write-Ahead Logging: the last connection to close
    checkpoints and deletes the WAL file)."""
    assert not os.path.exists(location + "-wal")
    return stocked


@sqlite_only
def test_a_read_only_file_refuses_a_load_and_still_reads(location, tmp_path, closed):
    aid = closed
    path = runs_csv(tmp_path / "more.csv", 3_000, seed=14)
    before = table_counts(location)
    os.chmod(location, 0o444)
    try:
        res = as_user(location, "load", path, "--campaign", "more")
        line = says_cannot_write(res)
        assert str(path) in line
        # looking stays possible: counts, the kept analysis, and its recheck
        inv = as_user(location, "inventory", "--json")
        assert inv.code == 0, inv
        assert inv.json()["runs"] == 6_000
        rec = as_user(location, "recall", str(aid), "--json")
        assert rec.code == 0 and rec.json()["state"] == "fresh", rec
        chk = as_user(location, "recheck", str(aid), "--json")
        assert chk.code == 0 and chk.json()["status"] == "unchanged", chk
    finally:
        os.chmod(location, 0o644)
    unchanged(location, before)


READ_ONLY_WRITERS = [
    pytest.param(name, id=name)
    for name in WRITERS
]


def said_once_not_kept(res) -> None:
    """An analysis on a warehouse that cannot be written prints its numbers and says once, in
    one line of its own, that it is not kept; nothing on stderr."""
    assert res.code == 0 and res.err == "", res
    assert "source of variation" in res.out
    said = [line for line in res.out.splitlines() if "not kept" in line]
    assert len(said) == 1 and "read-only here" in said[0], res.out


@sqlite_only
@pytest.mark.parametrize("name", READ_ONLY_WRITERS)
def test_analyses_claims_and_retractions_on_a_read_only_file(location, tmp_path, closed, name):
    before = table_counts(location)
    os.chmod(location, 0o444)
    try:
        res = as_user(location, *WRITERS[name](tmp_path, closed))
    finally:
        os.chmod(location, 0o644)
    if name == "blocktest":
        said_once_not_kept(res)
    else:
        assert "read-only here (its file may not be written)" in says_cannot_write(res)
        assert res.code == 2
    unchanged(location, before)


@sqlite_only
def test_a_read_only_folder_refuses_a_load_in_one_line(location, tmp_path, closed):
    # SQLite documentation, Write-Ahead Logging: the -wal and -shm files are made beside the
    # database; in a folder that cannot be written they cannot be made
    folder = os.path.dirname(location)
    assert not os.path.exists(location + "-wal")
    path = runs_csv(tmp_path / "more.csv", 3_000, seed=15)  # reading it needs no write permission
    before = table_counts(location)
    os.chmod(folder, 0o555)
    try:
        res = as_user(location, "load", path, "--campaign", "more")
        says_cannot_write(res)
        # reading works: SQLite opens the file read-only without its -shm file (immutable, as no
        # -wal file holds changes), and an analysis says once that it is not kept
        for argv in (("inventory",), ("recall", str(closed))):
            other = as_user(location, *argv)
            assert other.code == 0 and other.err == "", other
        said_once_not_kept(as_user(location, "blocktest", "--metric", "pallets"))
        assert not os.path.exists(location + "-wal")
    finally:
        os.chmod(folder, 0o755)
    unchanged(location, before)


# --- a server session that may not write -------------------------------------------------------

def read_only_session(location: str) -> str:
    """PostgreSQL documentation, default_transaction_read_only: every transaction of the session is
    read-only, as on a hot standby; set here through libpq's options parameter."""
    return location + "%20-cdefault_transaction_read_only%3Don"


SERVER_WRITERS = {
    "load": lambda tmp, aid: ("load", str(runs_csv(tmp / "more.csv", 3_000, seed=16)), "--campaign", "more"),
    **WRITERS,
}


@pytest.mark.skipif(not ON_POSTGRES, reason="a PostgreSQL session setting")
@pytest.mark.parametrize("name", [
    pytest.param(name, id=name)
    for name in SERVER_WRITERS
])
def test_a_read_only_server_session_refuses_writes_in_one_line(location, tmp_path, stocked, name):
    ro = read_only_session(location)
    inv = in_process(ro, "inventory", "--json")
    assert inv.code == 0 and inv.json()["runs"] == 6_000, inv  # reading is fine
    before = table_counts(location)
    res = in_process(ro, *SERVER_WRITERS[name](tmp_path, stocked))
    if name == "blocktest":  # the analysis reports; only keeping it fails, and it says so once
        said_once_not_kept(res)
        assert "the server session is read-only" in res.out
    else:
        says_cannot_write(res)
        assert res.code == 2
    unchanged(location, before)
