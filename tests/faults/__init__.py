"""Fault tests: killed loads, loaders side by side, full and read-only storage, malformed input,
fuzzing, schema upgrades and database credentials.

This module holds only the helpers they share: made-up result files, a way to run the real
command line in a separate process, and direct SQL looks at what a warehouse holds that do not
go through Blockyard's own code.
"""
from __future__ import annotations

import contextlib
import ctypes
import io
import os
import sqlite3
import subprocess
import sys
import uuid
from pathlib import Path

import numpy as np

from conftest import ON_POSTGRES, TEST_URL, CliResult

PYTHON = sys.executable
HEADER = ("solver", "version", "family", "group", "instance", "seed", "status", "host", "pallets", "seconds")
TABLES = ("campaigns", "imports", "solvers", "families", "groups", "instances", "metrics", "hosts",
          "retractions", "runs", "analyses", "claims", "cell_stats")


# --- made-up result files ----------------------------------------------------------------------

def runs_csv(path: Path, n: int, *, instances: int = 1000, solvers=("stacker", "packer"), version: str = "1.6",
             first_seed: int = 0, seed: int = 1) -> Path:
    """n made-up runs, written quickly with numpy: every instance is run by every solver.

    Run k is solver (k // instances) % len(solvers) on instance k % instances; instance i is in
    group g{i % 20} of family fam{i % 4} (20 blocks). `seed` varies the values, so that two files
    made with different seeds never have the same bytes.
    """
    k = np.arange(n, dtype=np.int64)
    inst = k % instances
    which = (k // instances) % len(solvers)
    seeds = k // (instances * len(solvers)) + first_seed
    rng = np.random.default_rng(seed)
    pallets = np.round(rng.normal(30.0, 2.0, n) - 0.5 * which, 3)
    seconds = np.round(rng.exponential(2.0, n), 4)
    cols = [
        np.asarray(solvers, dtype=object)[which],
        np.full(n, version, dtype=object),
        np.char.add("fam", (inst % 4).astype(str)).astype(object),
        np.char.add("g", (inst % 20).astype(str)).astype(object),
        np.char.add("i", inst.astype(str)).astype(object),
        seeds.astype(str).astype(object),
        np.full(n, "ok", dtype=object),
        np.where(inst % 2 == 0, "rack-a", "rack-b").astype(object),
        pallets.astype(str).astype(object),
        seconds.astype(str).astype(object),
    ]
    body = "\n".join(",".join(row) for row in zip(*cols))
    path.write_text(",".join(HEADER) + "\n" + body + "\n", encoding="utf-8")
    return path


# --- running Blockyard -------------------------------------------------------------------------

def clean_env(**extra) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("BLOCKYARD_DEBUG", "BLOCKYARD_WAREHOUSE")}
    env.update(extra)
    return env


def command(*argv) -> list[str]:
    return [PYTHON, "-m", "warehouse", *map(str, argv)]


def blockyard(*argv, env: dict | None = None, cwd=None, timeout: float = 300, preexec_fn=None) -> CliResult:
    """Run the real command line in its own process; returns code, stdout and stderr."""
    p = subprocess.run(command(*argv), capture_output=True, text=True, env=env or clean_env(), cwd=cwd,
                       timeout=timeout, preexec_fn=preexec_fn)
    return CliResult(p.returncode, p.stdout, p.stderr)


def in_process(location: str, *argv) -> CliResult:
    """Run a command in this process, as the `cli` fixture does, against any warehouse."""
    from warehouse.front.cli import run

    out, err = io.StringIO(), io.StringIO()
    code = run(["-w", location, *map(str, argv)], out=out, err=err)
    return CliResult(code, out.getvalue(), err.getvalue())


def one_line(err: str) -> str:
    """The single 'blockyard: ...' line a refusal must print; fails on tracebacks and internal errors."""
    assert "Traceback" not in err, err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("blockyard: "), lines[0]
    assert "internal error" not in lines[0], lines[0]
    return lines[0]


# --- looking at a warehouse without Blockyard's own code ----------------------------------------

def raw_engine(location: str):
    from sqlalchemy import create_engine

    if "://" in location:
        return create_engine(location.replace("postgresql://", "postgresql+psycopg://", 1))
    return create_engine(f"sqlite:///{location}")


def sql(location: str, statement: str, **params) -> list[tuple]:
    from sqlalchemy import text

    engine = raw_engine(location)
    try:
        with engine.begin() as c:
            result = c.execute(text(statement), params)
            return [tuple(r) for r in result] if result.returns_rows else []
    finally:
        engine.dispose()


def table_counts(location: str, tables=TABLES) -> dict[str, int]:
    """count(*) of every table that exists, by direct SQL."""
    from sqlalchemy import inspect, text

    engine = raw_engine(location)
    try:
        with engine.connect() as c:
            have = set(inspect(c).get_table_names())
            return {t: c.execute(text(f'SELECT count(*) FROM "{t}"')).scalar() for t in tables if t in have}
    finally:
        engine.dispose()


def sqlite_whole(path) -> None:
    """SQLite documentation, PRAGMA integrity_check and PRAGMA foreign_key_check: 'ok' and no rows."""
    con = sqlite3.connect(str(path))
    try:
        assert con.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert con.execute("PRAGMA foreign_key_check").fetchall() == []
    finally:
        con.close()


def cells_agree(location: str) -> None:
    """The cell summaries count exactly the live runs (one metric slot is enough to add them up)."""
    live = sql(location, "SELECT count(*) FROM runs WHERE retraction_id IS NULL")[0][0]
    slots = sql(location, "SELECT min(slot) FROM metrics")[0][0]
    if slots is None:
        assert live == 0
        return
    in_cells = sql(location, "SELECT coalesce(sum(n), 0) FROM cell_stats WHERE slot = :s", s=slots)[0][0]
    assert in_cells == live


# --- a second warehouse in the same test ---------------------------------------------------------

@contextlib.contextmanager
def another_location(tmp_path: Path, name: str):
    """Where one more fresh warehouse lives: a file beside the test's, or a schema of its own."""
    if not ON_POSTGRES:
        yield str(tmp_path / f"{name}.db")
        return
    from sqlalchemy import create_engine, text

    schema = f"t_{name[:8]}_{uuid.uuid4().hex[:8]}"
    admin = create_engine(TEST_URL.replace("postgresql://", "postgresql+psycopg://", 1))
    with admin.begin() as c:
        c.execute(text(f'CREATE SCHEMA "{schema}"'))
    sep = "&" if "?" in TEST_URL else "?"
    try:
        yield f"{TEST_URL}{sep}options=-csearch_path%3D{schema}"
    finally:
        with admin.begin() as c:
            c.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


@contextlib.contextmanager
def fresh_warehouse(folder: Path, name: str):
    """An initialised, empty warehouse outside the per-test fixtures, for a battery of tests to share."""
    from warehouse.store.connect import init_warehouse

    with another_location(folder, name) as location:
        init_warehouse(location).close()
        yield location


def schema_of(location: str) -> str:
    """The schema a test's PostgreSQL location points at (its search_path option)."""
    from urllib.parse import unquote

    return unquote(location).rsplit("search_path=", 1)[1].split("&")[0].split()[0]


# --- a process that file permissions apply to, even when the tests run as root ------------------

_CAPS_THAT_IGNORE_PERMISSIONS = (1, 2, 3)  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH, CAP_FOWNER
_PR_CAPBSET_DROP = 24


def without_permission_override():
    """preexec_fn for subprocess: the child cannot override file modes.

    Linux man-pages, capabilities(7) and prctl(2) PR_CAPBSET_DROP: root writes to a read-only
    file through CAP_DAC_OVERRIDE; a capability dropped from the bounding set is not regained at
    execve, so the child (still uid 0) is held to the file modes like anyone else.
    """
    if os.geteuid() != 0:
        return None

    def drop():
        libc = ctypes.CDLL(None, use_errno=True)
        for cap in _CAPS_THAT_IGNORE_PERMISSIONS:
            if libc.prctl(_PR_CAPBSET_DROP, cap, 0, 0, 0) != 0:
                raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP) failed")

    return drop
