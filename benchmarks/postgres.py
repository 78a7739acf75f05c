"""PostgreSQL: how fast a load and an analysis are there, against the server's own COPY and SQLite.

    python benchmarks/postgres.py                 # 510,000 runs (11 columns, 85 treatments), 3 rounds
    python benchmarks/postgres.py --rows 200000 --rounds 5
    python benchmarks/postgres.py --rounds 5 --repeat 3     # each round keeps the fastest of three
    python benchmarks/postgres.py --scale 1000000,3000000    # also: the warehouse grown to 1M, then 3M runs

The server is $BLOCKYARD_BENCH_PG (default postgresql://postgres@127.0.0.1/postgres); the
benchmark creates a scratch database there and drops it at the end. With no server reachable it
prints one line saying so and exits 0.

Each round, in turn (a shared machine drifts within minutes: only ratios within a round mean
anything, and the medians of those are printed; with --repeat N each round times the copy and
each load N times, interleaved, and keeps the fastest of each, since a busy neighbour only ever
adds time):

  copy      `psql \\copy` of the file into a flat table of 11 columns with no index (the floor the
            issue names; without psql, psycopg's COPY FROM STDIN fed the file's bytes)
  sqlite    `blockyard init` (not timed), then `blockyard load FILE` into a new SQLite file
  postgres  `blockyard init` on a fresh schema (not timed), then the same load into PostgreSQL

and then, on the two warehouses just loaded, a whole-data and a one-family blocktest, each timed
inside one process (the analysis alone, warm: the median of 5 after one untimed), so that the
interpreter's start-up, the same on both, does not hide the database's part.

--scale: after the rounds, files of --rows runs are loaded as one campaign each into one
PostgreSQL warehouse until it holds each size named; at each it prints the disk of every table
and index of the runs and the summaries, per million runs, the time of the last load, and the
time of a one-campaign blocktest. It prints numbers and never fails on them.
"""
from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import PY, timed  # noqa: E402

SERVER_ENV = "BLOCKYARD_BENCH_PG"
DEFAULT_SERVER = "postgresql://postgres@127.0.0.1/postgres"

WRITE = r'''
import sys
import numpy as np, pyarrow as pa, pyarrow.csv as pacsv
path, rows, night = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
treatments, instances = 85, 600  # 17 solvers x 5 versions; 600 instances in 20 groups of 4 families
rng = np.random.default_rng(11 + night)
idx = np.arange(rows, dtype=np.int64)
per_seed = treatments * instances
seed = idx // per_seed + 1 + 1000 * night
t = (idx % per_seed) // instances
i = idx % instances
g = i % 20
status = np.where(rng.random(rows) < 0.03, "timeout", "ok")
base = 20 + (i % 37)
ok = status == "ok"
start = np.datetime64("2026-11-01T00:00:00", "s") + np.timedelta64(night * 86400, "s")
fin = (start + (idx * 7 % 86400).astype("timedelta64[s]")).astype(str)
table = pa.table({
    "solver": np.array([f"stacker{k}" for k in range(17)])[t // 5],
    "version": np.array(["1.4", "1.5", "1.6", "2.0", "2.1"])[t % 5],
    "family": np.array(["mixed-sku", "uniform-cartons", "fragile-top", "oversize"])[g // 5],
    "group": np.char.add("g", (g % 5 + 1).astype(str)),
    "instance": np.char.add("inst-", i.astype(str)), "seed": seed, "status": status,
    "finished_at": np.char.add(fin, "Z"), "host": np.array(["rack-a", "rack-b", "rack-c"])[idx % 3],
    "pallets": pa.array(np.round(base * (1 + rng.normal(0, 0.02, rows)) * (1 - 0.001 * t), 2), mask=~ok),
    "seconds": pa.array(np.round(base * (0.5 + rng.random(rows)), 3), mask=~ok)})
pacsv.write_csv(table, path, pacsv.WriteOptions(quoting_style="none"))
'''

FLAT = ("CREATE TABLE flat (solver text, version text, family text, grp text, instance text, seed bigint, "
        "status text, finished_at text, host text, pallets float8, seconds float8)")

ANALYSE = r'''
import statistics, sys, time
from warehouse.analyses.blocktest import run_blocktest
from warehouse.collapse.settings import Collapse
from warehouse.select.slices import parse
from warehouse.store.connect import open_warehouse
wh = open_warehouse(sys.argv[1])
for text in sys.argv[2:]:
    def once():
        with wh.engine.connect() as conn:
            t = time.perf_counter()
            run_blocktest(conn, parse(text), "pallets", Collapse())
            return time.perf_counter() - t
    once()
    print(statistics.median(once() for _ in range(5)))
wh.close()
'''

SIZES = r'''
import sys
from sqlalchemy import create_engine, text
e = create_engine(sys.argv[1].replace("postgresql://", "postgresql+psycopg://", 1))
with e.connect() as c:
    for name, kind, size in c.execute(text(
            "SELECT c.relname, c.relkind, pg_relation_size(c.oid) FROM pg_class c "
            "JOIN pg_namespace n ON n.oid = c.relnamespace WHERE n.nspname = 'public' "
            "AND c.relkind IN ('r', 'i') AND pg_relation_size(c.oid) > 0 ORDER BY 3 DESC")):
        print(f"{name}\t{kind}\t{size}")
'''


def server_url(db: str | None = None) -> str:
    url = os.environ.get(SERVER_ENV, DEFAULT_SERVER)
    if db is None:
        return url
    head, _, _ = url.rpartition("/")
    return f"{head}/{db}"


def admin(statement: str, db: str | None = None) -> bool:
    """One statement in autocommit on the server (CREATE/DROP DATABASE); False when unreachable."""
    code = ("import sys, psycopg\n"
            "with psycopg.connect(sys.argv[1], autocommit=True, connect_timeout=5) as c: c.execute(sys.argv[2])")
    out = subprocess.run([PY, "-c", code, server_url(db), statement], capture_output=True, text=True)
    return out.returncode == 0


def run(cmd: list[str], **kw) -> float:
    wall, _, _ = timed(cmd, **kw)
    return wall


def copy_floor(csv_path: Path, url: str) -> float:
    """The server's own COPY of the file into a flat, unindexed table, as `psql \\copy` does it."""
    run([PY, "-c", "import sys, psycopg\nwith psycopg.connect(sys.argv[1], autocommit=True) as c:\n"
                   " c.execute('DROP TABLE IF EXISTS flat'); c.execute(sys.argv[2])", url, FLAT])
    psql = shutil.which("psql")
    if psql:
        return run([psql, "-q", "-d", url, "-c", f"\\copy flat from '{csv_path}' csv header"])
    feed = ("import sys, psycopg\nwith psycopg.connect(sys.argv[1]) as c, c.cursor() as cur:\n"
            " with cur.copy('COPY flat FROM STDIN (FORMAT csv, HEADER true)') as cp, open(sys.argv[2], 'rb') as f:\n"
            "  while b := f.read(1 << 20): cp.write(b)\n")
    return run([PY, "-c", feed, url, str(csv_path)])


def fresh_pg(url: str) -> None:
    run([PY, "-c", "import sys, psycopg\nwith psycopg.connect(sys.argv[1], autocommit=True) as c:\n"
                   " c.execute('DROP SCHEMA IF EXISTS public CASCADE'); c.execute('CREATE SCHEMA public')", url])
    run([PY, "-m", "warehouse", "init", "-w", url])


def load(csv_path: Path, where: str, campaign: str) -> float:
    return run([PY, "-m", "warehouse", "load", str(csv_path), "--campaign", campaign, "-w", where])


def analyses(where: str, *slices: str) -> list[float]:
    _, _, out = timed([PY, "-c", ANALYSE, where, *slices])
    return [float(x) for x in out.split()]


def write_file(path: Path, rows: int, night: int = 0) -> None:
    subprocess.run([PY, "-c", WRITE, str(path), str(rows), str(night)], check=True)


def rounds(work: Path, csv_path: Path, url: str, n: int, repeat: int = 1) -> None:
    db = work / "s.db"

    def fresh(name: str) -> None:
        if name == "postgres":
            fresh_pg(url)
            return
        for f in work.glob("s.db*"):
            f.unlink()
        run([PY, "-m", "warehouse", "init", "-w", str(db)])

    seen = []
    for k in range(n):
        copy = min(copy_floor(csv_path, url) for _ in range(repeat))
        order = [("sqlite", str(db)), ("postgres", url)]
        took: dict[str, float] = {}
        for _ in range(repeat):  # (the fastest of each kept: interruptions only ever add time)
            for name, where in (order if k % 2 == 0 else order[::-1]):
                fresh(name)
                t = load(csv_path, where, "night-00")
                took[name] = min(took.get(name, t), t)
        sa, sf = analyses(str(db), "", "family=oversize")
        pa, pf = analyses(url, "", "family=oversize")
        row = (took["postgres"] / copy, took["postgres"] / took["sqlite"], pa / sa, pf / sf)
        seen.append(row)
        print(f"round {k + 1}  copy {copy:5.2f} s  sqlite load {took['sqlite']:5.2f} s  postgres load "
              f"{took['postgres']:5.2f} s   postgres/copy {row[0]:.2f}  postgres/sqlite {row[1]:.2f}   "
              f"blocktest all {pa:.3f}/{sa:.3f} s = {row[2]:.2f}  one family {pf:.3f}/{sf:.3f} s = {row[3]:.2f}")
    med = [statistics.median(r[i] for r in seen) for i in range(4)]
    print(f"median   load postgres/copy {med[0]:.2f} (aim: 3 or less)  postgres/sqlite {med[1]:.2f} (aim: 1 or less)   "
          f"blocktest postgres/sqlite: all {med[2]:.2f}, one family {med[3]:.2f} (aim: 1.1 or less)")


def scale(work: Path, url: str, rows: int, sizes: list[int]) -> None:
    fresh_pg(url)
    held = night = 0
    for target in sizes:
        last = 0.0
        while held < target:
            night += 1
            f = work / "night.csv"
            write_file(f, rows, night)
            last = load(f, url, f"night-{night:02d}")
            held += rows
        one = analyses(url, "campaign=night-01", f"campaign=night-{night:02d}")
        _, _, out = timed([PY, "-c", SIZES, url])
        sizes_of = [line.split("\t") for line in out.splitlines()]
        total = sum(int(s) for _, _, s in sizes_of)
        print(f"scale {held:,} runs in {night} campaigns: last load {last:.2f} s ({rows / last:,.0f} runs/s); "
              f"blocktest of the first campaign {one[0]:.3f} s, of the last {one[1]:.3f} s; "
              f"disk {total / 2**20:,.0f} MiB ({total / 2**20 / (held / 1e6):,.0f} MiB per million runs)")
        for name, kind, size in sizes_of[:8]:
            print(f"      {name:<28} {'index' if kind == 'i' else 'table':<6} {int(size) / 2**20:9,.1f} MiB  "
                  f"{int(size) / (held / 1e6) / 2**20:7,.1f} MiB per million runs")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=510_000, help="runs in the file (default 510,000)")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved rounds (default 3)")
    ap.add_argument("--repeat", type=int, default=1,
                    help="in each round, the copy and each load this many times, the fastest kept (default 1)")
    ap.add_argument("--scale", help="also grow one warehouse to these sizes, e.g. 1000000,3000000")
    ap.add_argument("--no-rounds", action="store_true", help="only the --scale part")
    a = ap.parse_args()
    if a.repeat < 1 or a.rounds < 1:
        ap.error("--rounds and --repeat take a whole number of 1 or more")
    db = f"blockyard_bench_{os.getpid()}"
    if not admin(f"CREATE DATABASE {db}"):
        print(f"postgres benchmark skipped: no PostgreSQL server reachable at {server_url()} "
              f"(set ${SERVER_ENV} to a postgresql:// URL of a server where a database may be created)")
        return
    url = server_url(db)
    work = Path(tempfile.mkdtemp(prefix="blockyard-pg-"))
    try:
        src = work / f"runs-{a.rows}.csv"
        write_file(src, a.rows)
        print(f"file     {a.rows:,} runs, 11 columns, 85 treatments, {src.stat().st_size / 2**20:.0f} MiB; "
              f"server {server_url().rpartition('@')[2]}")
        if not a.no_rounds:
            rounds(work, src, url, a.rounds, a.repeat)
        if a.scale:
            scale(work, url, a.rows, sorted(int(x) for x in a.scale.split(",")))
    finally:
        shutil.rmtree(work, ignore_errors=True)
        time.sleep(0.5)
        admin(f"DROP DATABASE IF EXISTS {db} WITH (FORCE)")


if __name__ == "__main__":
    main()
