"""PostgreSQL: a load whose client dies or stops does not keep the runs table locked.

A load holds the runs table's write lock (SHARE ROW EXCLUSIVE) for its whole transaction, so
the next load waits for it. A client killed with SIGKILL (POSIX, signal.h: it cannot be caught,
no clean-up runs) closes its socket, and the server ends the session; a client that stops
answering (SIGSTOP: alive, socket open, silent) is ended by the load's
idle_in_transaction_session_timeout (PostgreSQL documentation, "Client Connection Defaults").
Either way the next load completes and the dead load left nothing behind.
"""
from __future__ import annotations

import signal
import subprocess
import time

import pytest

from conftest import ON_POSTGRES

from . import blockyard, clean_env, command, runs_csv, schema_of, sql

pytestmark = pytest.mark.skipif(not ON_POSTGRES, reason="PostgreSQL: a server session outliving its client")

POLL = 0.02


def lock_holder(location) -> int | None:
    """The server process holding this schema's runs table for a load (pg_locks), or None."""
    rows = sql(location, """
        SELECT l.pid FROM pg_locks l JOIN pg_class c ON c.oid = l.relation
        JOIN pg_namespace n ON n.oid = c.relnamespace
        WHERE c.relname = 'runs' AND n.nspname = :schema AND l.mode = 'ShareRowExclusiveLock' AND l.granted
    """, schema=schema_of(location))
    return int(rows[0][0]) if rows else None


def session_state(pid: int, location) -> str | None:
    rows = sql(location, "SELECT state FROM pg_stat_activity WHERE pid = :p", p=pid)
    return rows[0][0] if rows else None


def holding_load(location, path, campaign, env) -> tuple[subprocess.Popen, int]:
    proc = subprocess.Popen(command("load", path, "--campaign", campaign, "-w", location),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env)
    pid = None
    while proc.poll() is None and pid is None:
        pid = lock_holder(location)
        time.sleep(POLL)
    assert proc.poll() is None and pid is not None, "the load ended before it held the lock: use a larger file"
    return proc, pid


def next_load_goes_through(location, tmp_path, killed_pid: int) -> None:
    small = runs_csv(tmp_path / "next.csv", 2_000, seed=6)
    done = blockyard("load", small, "--campaign", "next", "-w", location, "--json", timeout=240)
    assert done.code == 0, done
    assert done.json()["imports"][0]["status"] == "loaded"
    # the dead load's session is gone, and nothing of it was stored
    assert session_state(killed_pid, location) is None
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 2_000
    assert sql(location, "SELECT count(*) FROM imports")[0][0] == 1
    assert lock_holder(location) is None


def test_a_killed_load_lets_the_next_load_through(location, tmp_path):
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=5)
    proc, pid = holding_load(location, big, "killed", clean_env())
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    next_load_goes_through(location, tmp_path, pid)


def test_a_stopped_load_is_ended_by_the_server_and_the_next_load_goes_through(location, tmp_path):
    big = runs_csv(tmp_path / "big.csv", 150_000, seed=7)
    # a short idle limit for this load (connect.LOAD_IDLE_ENV): the next load waits that long
    proc, pid = holding_load(location, big, "stopped", clean_env(BLOCKYARD_LOAD_IDLE_SECONDS="2"))
    try:
        # stop the client while its session is idle in the transaction (between two statements),
        # not in the middle of one (a statement's own limits are another matter)
        for _ in range(500):
            proc.send_signal(signal.SIGSTOP)
            time.sleep(0.05)
            if session_state(pid, location) == "idle in transaction":
                break
            proc.send_signal(signal.SIGCONT)
            time.sleep(POLL)
        else:
            pytest.fail("never caught the load between two statements")
        assert proc.poll() is None
        next_load_goes_through(location, tmp_path, pid)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.send_signal(signal.SIGCONT)
        proc.wait(timeout=60)
