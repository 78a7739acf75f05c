"""PostgreSQL: a load whose client dies or stops does not keep its locks; loads of other
campaigns go on beside a load.

A load holds its campaign's lock (an advisory lock, store/connect.CAMPAIGN_LOCK_CLASS) and the
runs table's ROW EXCLUSIVE lock for its whole transaction, so the next load of that campaign
waits for it; a load of another campaign does not (revision 0011). A client killed with SIGKILL (POSIX, signal.h: it cannot be caught,
no clean-up runs) closes its socket, and the server ends the session; a client that stops
answering (SIGSTOP: alive, socket open, silent) is ended by the load's
idle_in_transaction_session_timeout (PostgreSQL documentation, "Client Connection Defaults").
Either way the next load completes and the dead load left nothing behind.
"""
from __future__ import annotations

import json
import signal
import subprocess
import time

import pytest

from conftest import ON_POSTGRES
from warehouse.store.connect import NAMES_LOCK_CLASS

from . import blockyard, clean_env, command, raw_engine, runs_csv, schema_of, sql

pytestmark = pytest.mark.skipif(not ON_POSTGRES, reason="PostgreSQL: a server session outliving its client")

POLL = 0.02


HOLDER = """
    SELECT l.pid FROM pg_locks l JOIN pg_class c ON c.oid = l.relation
    JOIN pg_namespace n ON n.oid = c.relnamespace
    WHERE c.relname = 'runs' AND n.nspname = :schema AND l.mode = 'RowExclusiveLock' AND l.granted
    LIMIT 1"""


def lock_holder(location) -> int | None:
    """The server process holding this schema's runs table for writing (pg_locks: ROW EXCLUSIVE,
    the lock INSERT and UPDATE take; readers take ACCESS SHARE), or None."""
    rows = sql(location, HOLDER, schema=schema_of(location))
    return int(rows[0][0]) if rows else None


def session_state(pid: int, location) -> str | None:
    rows = sql(location, "SELECT state FROM pg_stat_activity WHERE pid = :p", p=pid)
    return rows[0][0] if rows else None


def holding_load(location, path, campaign, env) -> tuple[subprocess.Popen, int]:
    # one connection, open before the load starts, asks until the load holds the lock: a new
    # connection for each question took longer than a fast load holds it (on a busy machine)
    from sqlalchemy import text

    engine = raw_engine(location)
    try:
        with engine.connect() as watch:
            watch = watch.execution_options(isolation_level="AUTOCOMMIT")
            proc = subprocess.Popen(command("load", path, "--campaign", campaign, "-w", location),
                                    stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env)
            pid = None
            while proc.poll() is None and pid is None:
                pid = watch.execute(text(HOLDER), {"schema": schema_of(location)}).scalar()
                time.sleep(0.005)
    finally:
        engine.dispose()
    assert proc.poll() is None and pid is not None, "the load ended before it held the lock: use a larger file"
    return proc, pid


def next_load_goes_through(location, tmp_path, killed_pid: int, campaign: str) -> None:
    """The next load of the dead load's campaign (it waits for the campaign's lock) completes."""
    small = runs_csv(tmp_path / "next.csv", 2_000, seed=6)
    done = blockyard("load", small, "--campaign", campaign, "-w", location, "--json", timeout=240)
    assert done.code == 0, done
    assert done.json()["imports"][0]["status"] == "loaded"
    # the dead load's session is gone, and nothing of it was stored
    assert session_state(killed_pid, location) is None
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 2_000
    assert sql(location, "SELECT count(*) FROM imports")[0][0] == 1
    assert lock_holder(location) is None


def stop_between_statements(proc, pid: int, location) -> None:
    """Stop the client while its session is idle in the transaction (between two statements),
    not in the middle of one (a statement's own limits are another matter)."""
    for _ in range(500):
        proc.send_signal(signal.SIGSTOP)
        time.sleep(0.05)
        if session_state(pid, location) == "idle in transaction":
            return
        proc.send_signal(signal.SIGCONT)
        time.sleep(POLL)
    pytest.fail("never caught the load between two statements")


def waits_for_lock(location, proc, event: str, what: str, tries: int = 200) -> None:
    """Until some session of the database waits for a lock of this kind (pg_stat_activity's
    wait_event: 'advisory' or 'relation'); `proc` must still be running meanwhile."""
    for _ in range(tries):
        if sql(location, "SELECT count(*) FROM pg_stat_activity WHERE wait_event_type = 'Lock' "
                         "AND wait_event = :e AND datname = current_database()", e=event)[0][0]:
            return
        assert proc.poll() is None, f"{what} ended without waiting"
        time.sleep(0.05)
    pytest.fail(f"{what} never waited")


def test_a_killed_load_lets_the_next_load_through(location, tmp_path):
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=5)
    proc, pid = holding_load(location, big, "killed", clean_env())
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    next_load_goes_through(location, tmp_path, pid, "killed")


def test_a_stopped_load_is_ended_by_the_server_and_the_next_load_goes_through(location, tmp_path):
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=7)
    # a short idle limit for this load (connect.LOAD_IDLE_ENV): the next load waits that long
    proc, pid = holding_load(location, big, "stopped", clean_env(BLOCKYARD_LOAD_IDLE_SECONDS="2"))
    try:
        stop_between_statements(proc, pid, location)
        assert proc.poll() is None
        next_load_goes_through(location, tmp_path, pid, "stopped")
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.send_signal(signal.SIGCONT)
        proc.wait(timeout=60)


def test_a_load_of_another_campaign_goes_on_beside_a_load(location, tmp_path):
    """A load stopped in the middle of its transaction holds its campaign and the runs table;
    a load of another campaign, bringing a solver the warehouse has not seen, completes
    meanwhile, with ids of its own; the stopped load, let go, completes too. (The first load
    brings no new name: a load that adds names holds the names lock until it commits, and
    another load that adds names waits for it; docs/reliability.md.)"""
    known = runs_csv(tmp_path / "known.csv", 2_000, seed=12)  # the metrics, solvers and instances
    assert blockyard("load", known, "--campaign", "earlier", "-w", location).code == 0
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=8)
    proc, pid = holding_load(location, big, "first", clean_env(BLOCKYARD_LOAD_IDLE_SECONDS="600"))
    try:
        stop_between_statements(proc, pid, location)
        other = runs_csv(tmp_path / "other.csv", 3_000, instances=500, solvers=("stacker", "wrapper"), seed=9)
        done = blockyard("load", other, "--campaign", "second", "-w", location, "--json", timeout=120)
        assert done.code == 0, done
        assert done.json()["imports"][0]["rows_loaded"] == 3_000
        assert session_state(pid, location) == "idle in transaction"  # the first still holds its locks
    finally:
        proc.send_signal(signal.SIGCONT)
    _, err = proc.communicate(timeout=240)
    assert proc.returncode == 0, err
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 155_000
    # each import's id range holds its own runs alone (the ranges slices and verify read)
    rows = sql(location, "SELECT i.id, count(r.id), count(DISTINCT r.import_id) FROM imports i "
                         "JOIN runs r ON r.id BETWEEN i.first_run_id AND i.last_run_id GROUP BY i.id")
    assert sorted(r[1:] for r in rows) == [(2_000, 1), (3_000, 1), (150_000, 1)]
    check = blockyard("verify", "-w", location, "--json", timeout=240)
    assert check.code == 0, check


def test_a_second_load_of_one_campaign_waits_for_the_first(location, tmp_path):
    """Two loads of one campaign take turns: the second waits on the campaign's lock while the
    first is stopped, and completes once the first has committed."""
    known = runs_csv(tmp_path / "known.csv", 2_000, seed=13)
    assert blockyard("load", known, "--campaign", "earlier", "-w", location).code == 0
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=10)
    proc, pid = holding_load(location, big, "same", clean_env(BLOCKYARD_LOAD_IDLE_SECONDS="600"))
    second = None
    try:
        stop_between_statements(proc, pid, location)
        more = runs_csv(tmp_path / "more.csv", 2_000, first_seed=1000, seed=11)
        second = subprocess.Popen(command("load", more, "--campaign", "same", "-w", location),
                                  stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=clean_env())
        waits_for_lock(location, second, "advisory", "the second load of the campaign")
    finally:
        proc.send_signal(signal.SIGCONT)
    _, err = proc.communicate(timeout=240)
    assert proc.returncode == 0, err
    _, err = second.communicate(timeout=240)
    assert second.returncode == 0, err
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 154_000


def test_a_load_the_server_rolls_back_for_a_deadlock_starts_again(location, tmp_path):
    """A deadlock between two writers is broken by the server rolling one back (PostgreSQL
    documentation, "Deadlocks", and deadlock_timeout, 1 s by default). Here another session
    holds runs for writing; the load, the warehouse's first, must add its metrics' columns and
    waits for it; the other session then asks for the names lock the load holds. The load, which
    waited first, is rolled back, starts again from the file once the other session is done, and
    says so."""
    first = runs_csv(tmp_path / "first.csv", 2_000, seed=14)
    engine = raw_engine(location)
    try:
        with engine.connect() as other:
            other.exec_driver_sql("BEGIN")
            other.exec_driver_sql("LOCK TABLE runs IN ROW EXCLUSIVE MODE")
            proc = subprocess.Popen(command("load", first, "--campaign", "first", "-w", location, "--json"),
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
            waits_for_lock(location, proc, "relation", "the load adding a metric's column", tries=400)
            other.exec_driver_sql(f"SELECT pg_advisory_xact_lock({NAMES_LOCK_CLASS}, hashtext(current_schema()))")
            other.exec_driver_sql("ROLLBACK")
        out, err = proc.communicate(timeout=120)
    finally:
        engine.dispose()
    assert proc.returncode == 0, err
    report = json.loads(out)["imports"][0]
    assert report["rows_loaded"] == 2_000
    assert any("deadlock" in w for w in report["warnings"]), report
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 2_000


def test_a_retraction_waits_for_a_load_running(location, tmp_path):
    """A retraction takes runs' SHARE ROW EXCLUSIVE lock, which a load's ROW EXCLUSIVE holds off
    (PostgreSQL documentation, "Explicit Locking", table of conflicting lock modes): it waits
    while a load of another campaign is stopped in its transaction and completes after it."""
    known = runs_csv(tmp_path / "known.csv", 2_000, seed=15)
    assert blockyard("load", known, "--campaign", "earlier", "-w", location).code == 0
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=16)
    proc, pid = holding_load(location, big, "later", clean_env(BLOCKYARD_LOAD_IDLE_SECONDS="600"))
    retraction = None
    try:
        stop_between_statements(proc, pid, location)
        retraction = subprocess.Popen(command("retract", "--slice", "campaign=earlier", "--reason", "bad rack",
                                              "-w", location),
                                      stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=clean_env())
        waits_for_lock(location, retraction, "relation", "the retraction")
    finally:
        proc.send_signal(signal.SIGCONT)
    _, err = proc.communicate(timeout=240)
    assert proc.returncode == 0, err
    _, err = retraction.communicate(timeout=240)
    assert retraction.returncode == 0, err
    assert sql(location, "SELECT count(*) FROM runs WHERE retraction_id IS NOT NULL")[0][0] == 2_000
    assert sql(location, "SELECT count(*) FROM runs WHERE retraction_id IS NULL")[0][0] == 150_000
