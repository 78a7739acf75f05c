"""Helpers for the loading tests: write made-up source files, run loads, read what was stored.

The source files are test input invented inline; every check value is stated next to its check.
"""
from __future__ import annotations

import gzip
import io
import json
import uuid
from contextlib import contextmanager
from pathlib import Path

from sqlalchemy import text

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "finished_at", "host",
          "pallets", "seconds"]


def runs(n: int = 6, solver: str = "stacker", version: str = "1.6", start_seed: int = 1) -> list[dict]:
    """n made-up runs over two groups of one family; every value derivable from the seed."""
    out = []
    for k in range(n):
        seed = start_seed + k
        out.append({
            "solver": solver, "version": version, "family": "mixed-sku", "group": f"g{1 + k % 2}",
            "instance": f"inst-{k % 3}", "seed": seed, "status": "ok",
            "finished_at": f"2026-11-09T{10 + k % 10:02d}:00:00Z", "host": "rack-a",
            "pallets": 20 + seed, "seconds": 1.5 * seed,
        })
    return out


def write(path: Path, content: str | bytes, gz: bool = False) -> Path:
    data = content.encode("utf-8") if isinstance(content, str) else content
    if gz:
        data = gzip.compress(data)
    path.write_bytes(data)
    return path


def parquet(path: Path, rows: list[dict]) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pylist(rows), path)
    return path


def csv_text(rows: list[dict], delim: str = ",", header: list[str] | None = None, newline: str = "\n") -> str:
    header = header or list(rows[0])
    lines = [delim.join(header)]
    for r in rows:
        lines.append(delim.join(str(r.get(h, "")) for h in header))
    return newline.join(lines) + newline


def jsonl_text(rows: list[dict]) -> str:
    return "".join(json.dumps(r) + "\n" for r in rows)


def load(cli, path, *args, campaign: str = "c"):
    return cli("load", str(path), "--campaign", campaign, *args)


def load_json(cli, path, *args, campaign: str = "c") -> dict:
    res = load(cli, path, "--json", *args, campaign=campaign)
    assert res.code == 0, res
    doc = res.json()
    assert len(doc["imports"]) == 1
    return doc["imports"][0]


def refusal(cli, path, *args, campaign: str = "c") -> str:
    """Load a file that must be refused: exit status 2 and exactly one line on stderr; returns it."""
    res = load(cli, path, *args, campaign=campaign)
    assert res.code == 2, res
    lines = res.err.strip().splitlines()
    assert len(lines) == 1, res.err
    assert lines[0].startswith("blockyard: "), lines[0]
    return lines[0]


def query(location: str, sql: str, **params) -> list[tuple]:
    from warehouse.store.connect import open_warehouse

    wh = open_warehouse(location)
    try:
        with wh.engine.connect() as c:
            return [tuple(r) for r in c.execute(text(sql), params)]
    finally:
        wh.close()


def stored_runs(location: str) -> list[tuple]:
    """(solver, version, family, group, instance, seed, replicate, status, finished_at, host, pallets, seconds)."""
    slots = [r[0] for r in query(location, "SELECT slot FROM metrics ORDER BY slot")]

    def value(metric: str) -> str:
        if not slots:
            return "NULL"
        arms = " ".join(f"WHEN {int(s)} THEN r.v{int(s)}" for s in slots)  # a run has a column per metric's slot
        return f"(SELECT CASE m.slot {arms} END FROM metrics m WHERE m.name = '{metric}')"

    return query(location, f"""
        SELECT s.name, s.version, f.name, g.name, i.name, r.seed, r.replicate, r.status, r.finished_at,
               COALESCE(h.name, ''), {value('pallets')}, {value('seconds')}
        FROM runs r JOIN solvers s ON s.id = r.solver_id JOIN instances i ON i.id = r.instance_id
        JOIN groups g ON g.id = i.group_id JOIN families f ON f.id = g.family_id
        LEFT JOIN hosts h ON h.id = r.host_id
        ORDER BY s.name, s.version, f.name, g.name, i.name, r.seed, r.replicate""")


def metric_values(location: str, metric: str) -> list:
    slot = query(location, "SELECT slot FROM metrics WHERE name = :m", m=metric)[0][0]
    return [r[0] for r in query(location, f"SELECT v{int(slot)} FROM runs ORDER BY source_line")]


def everything(location: str) -> dict:
    """Every count the warehouse keeps, for 'nothing changed' checks."""
    from conftest import run_counts

    return run_counts(location)


@contextmanager
def module_warehouse(tmp_path_factory):
    """One initialised warehouse shared by the tests of a module (the ones that must leave it unchanged)."""
    from conftest import ON_POSTGRES, TEST_URL, _pg_location
    from warehouse.store.connect import init_warehouse

    if not ON_POSTGRES:
        loc = str(tmp_path_factory.mktemp("shared") / "shared.db")
        init_warehouse(loc).close()
        yield loc
        return
    from sqlalchemy import create_engine

    schema = "t_" + uuid.uuid4().hex[:12]
    admin = create_engine(TEST_URL.replace("postgresql://", "postgresql+psycopg://", 1))
    with admin.begin() as c:
        c.execute(text(f'CREATE SCHEMA "{schema}"'))
    try:
        loc = _pg_location(schema)
        init_warehouse(loc).close()
        yield loc
    finally:
        with admin.begin() as c:
            c.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


def cli_at(location: str):
    """A `cli`-like runner for a given warehouse."""
    from conftest import CliResult
    from warehouse.front.cli import run

    def _run(*argv: str, warehouse: str | None = None):
        out, err = io.StringIO(), io.StringIO()
        code = run(["-w", warehouse or location, *argv], out=out, err=err)
        return CliResult(code, out.getvalue(), err.getvalue())

    return _run
