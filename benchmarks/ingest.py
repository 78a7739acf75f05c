"""How fast `blockyard load` is, measured against a naive loader on the same file and machine.

    python benchmarks/ingest.py              # 1,000,000 runs, plus the 3,000,000-run memory check
    python benchmarks/ingest.py --quick      # 200,000 runs (memory check at 200k and 600k)
    python benchmarks/ingest.py --rows 500000

It writes a made-up campaign file (solver, version, family, group, instance, seed, status,
finished_at, host and three metrics), then times, each as its own process:

  load       `blockyard init` (not timed), then `blockyard load FILE --campaign bench` (timed)
  reference  a small script: the csv module reads the file and sqlite3's executemany writes every
             row into one flat table of text columns with no index, committed once at the end

and prints load / reference (the aim is 1.25 or less). It also times a floor: the same runs,
parsed beforehand (not timed), written by SQLite alone into a fresh warehouse's runs table the
way the loader writes them (multi-row executemany, any full index on the runs rebuilt after (a
SQLite warehouse has none since schema 0007), one commit, WAL), timed inside its process with no
start-up. Whatever the loader does
beyond that floor (start-up, reading, checking, cell summaries) has to fit in what is left. Peak memory is each child's own maximum
resident size (ru_maxrss from wait4), for a file of N runs and one of 3N runs: chunked reading
keeps it about flat. It prints numbers and never fails on them.

    python benchmarks/ingest.py --against /tmp/other-tree --repeat 7 --no-memory

A/B: each round loads the file with this tree's code and then with the code of another copy of
the tree (a commit before, or a copy with one device taken out), both as `python -m warehouse`
with that tree first on PYTHONPATH, beside one reference run; it prints each round's ratios and
their medians (a virtual machine's speed drifts within minutes: only ratios within a round mean
anything).

This process stays small on purpose (standard library only; the files are written by a child):
on Linux a child's ru_maxrss starts from the resident size of the process that started it.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SOLVERS = ["stacker", "packwell", "tetra", "layerup"]
VERSIONS = ["1.4", "1.5", "1.6", "2.0"]
FAMILIES = ["mixed-sku", "uniform-cartons", "fragile-top", "oversize"]
GROUPS_PER_FAMILY = 5  # 20 groups
INSTANCES = 1000  # spread over the groups
HOSTS = ["rack-a", "rack-b", "rack-c"]

LAYOUT = """[metrics.pallets]
sense = "min"
[metrics.fill_pct]
sense = "max"
[metrics.seconds]
sense = "min"
unit = "s"
"""

REFERENCE = r'''
import csv, sqlite3, sys
src, db = sys.argv[1], sys.argv[2]
con = sqlite3.connect(db)
with open(src, newline="", encoding="utf-8") as fh:
    rows = csv.reader(fh)
    header = next(rows)
    cols = ", ".join(f'"{c}" TEXT' for c in header)
    con.execute(f"CREATE TABLE flat ({cols})")
    marks = ", ".join("?" * len(header))
    con.executemany(f"INSERT INTO flat VALUES ({marks})", rows)
con.commit()
con.close()
'''


PREPARE = r'''
import sys, numpy as np, pyarrow as pa, pyarrow.compute as pc, pyarrow.csv as pacsv
t = pacsv.read_csv(sys.argv[1])
n = t.num_rows
def codes(*cols):
    key = pc.binary_join_element_wise(*[t[c].cast(pa.string()) for c in cols], "\x1f")
    return pc.dictionary_encode(key).combine_chunks().indices.to_numpy().astype(np.float64) + 1
status = (pc.equal(t["status"], "ok").to_numpy(zero_copy_only=False) == False).astype(np.float64)
finished = t["finished_at"].cast(pa.timestamp("s", tz="UTC")).cast(pa.int64()).to_numpy()
cols = [np.arange(1, n + 1, dtype=np.float64), codes("solver", "version"), codes("family", "group", "instance"),
        t["seed"].to_numpy().astype(np.float64), np.zeros(n), status, finished.astype(np.float64),
        codes("host"), np.arange(2, n + 2, dtype=np.float64)]
cols += [t[m].cast(pa.float64()).to_numpy(zero_copy_only=False) for m in ("pallets", "fill_pct", "seconds")]
np.save(sys.argv[2], np.column_stack(cols))
'''

FLOOR = r'''
import sqlite3, sys, time, numpy as np
db, npy = sys.argv[1], sys.argv[2]
table = np.load(npy)
con = sqlite3.connect(db, isolation_level=None)
for p in ("busy_timeout = 5000", "foreign_keys = OFF", "synchronous = NORMAL", "cache_size = -65536"):
    con.execute("PRAGMA " + p)
cols = ["id", "solver_id", "instance_id", "seed", "replicate", "status", "finished_at", "host_id", "source_line",
        "v1", "v2", "v3"]
width = len(cols)
k = 999 // (width + 2) if sqlite3.sqlite_version_info < (3, 32) else 4000 // width
marks = "(" + ", ".join(["?", "1", "1"] + ["?"] * (width - 1)) + ")"
head = "INSERT INTO runs (id, campaign_id, import_id, " + ", ".join(cols[1:]) + ") VALUES "
t0 = time.perf_counter()
con.execute("BEGIN IMMEDIATE")
con.execute("INSERT INTO campaigns (id, name, created_at) VALUES (1, 'floor', 0)")
have = {r[1] for r in con.execute("PRAGMA table_info(runs)")}
for c in cols[-3:]:  # a new warehouse gets a value column as a metric takes its slot, as the loader does
    if c not in have:
        con.execute(f"ALTER TABLE runs ADD COLUMN {c} FLOAT")
idx = con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'index' AND tbl_name = 'runs' "
                  "AND sql IS NOT NULL AND sql NOT LIKE '%WHERE%'").fetchall()
for name, _ in idx:
    con.execute(f'DROP INDEX "{name}"')
for c in range(0, len(table), 100_000):
    part = table[c:c + 100_000]
    full = len(part) // k * k
    if full:
        con.executemany(head + ", ".join([marks] * k), part[:full].reshape(-1, k * width).tolist())
    if len(part) > full:
        con.executemany(head + marks, part[full:].tolist())
con.execute("PRAGMA temp_store = FILE")
for _, sql in idx:
    con.execute(sql)
con.execute("COMMIT")
print(time.perf_counter() - t0)
'''


def time_floor(csv_path: Path, work: Path) -> float:
    """SQLite alone writing the parsed runs the loader's way; seconds inside the process."""
    npy = work / "floor.npy"
    if not npy.exists():
        subprocess.run([sys.executable, "-c", PREPARE, str(csv_path), str(npy)], check=True)
    db = work / "floor.db"
    for f in work.glob("floor.db*"):
        f.unlink()
    run_child(blockyard_cmd() + ["init", "-w", str(db)])
    out = subprocess.run([sys.executable, "-c", FLOOR, str(db), str(npy)], check=True, capture_output=True, text=True)
    return float(out.stdout.strip())


def write_campaign(path: Path, rows: int, seed: int = 7) -> None:
    """A campaign of `rows` runs: every treatment x instance x seed, cut at `rows`."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    treatments = [(s, v) for s in SOLVERS for v in VERSIONS]  # 16 treatments
    per_seed = len(treatments) * INSTANCES
    seeds = -(-rows // per_seed)
    idx = np.arange(rows, dtype=np.int64)
    seed_no = idx // per_seed + 1
    rest = idx % per_seed
    treat = rest // INSTANCES
    inst = rest % INSTANCES
    group = inst % (len(FAMILIES) * GROUPS_PER_FAMILY)
    family = group // GROUPS_PER_FAMILY
    solver = np.array([t[0] for t in treatments], dtype=object)[treat]
    version = np.array([t[1] for t in treatments], dtype=object)[treat]
    fam_names = np.array(FAMILIES, dtype=object)
    group_names = np.array([f"g{g % GROUPS_PER_FAMILY + 1}" for g in range(len(FAMILIES) * GROUPS_PER_FAMILY)], dtype=object)
    inst_names = np.array([f"{FAMILIES[(i % 20) // 5]}-{i:04d}" for i in range(INSTANCES)], dtype=object)
    status = np.where(rng.random(rows) < 0.03, "timeout", "ok").astype(object)
    base = 20 + (inst % 37)
    pallets = np.round(base * (1 + rng.normal(0, 0.02, rows))).astype(np.int64).astype(str).astype(object)
    fill = np.round(70 + 25 * rng.random(rows), 2).astype(str).astype(object)
    secs = np.round(base * (0.5 + rng.random(rows)), 3).astype(str).astype(object)
    timeout = status == "timeout"
    pallets[timeout] = ""
    fill[timeout] = ""
    start = np.datetime64("2026-11-01T00:00:00", "s")
    finished = (start + (idx * 7 % (30 * 86400)).astype("timedelta64[s]")).astype(str).astype(object) + "Z"
    frame = pd.DataFrame({
        "solver": solver, "version": version, "family": fam_names[family], "group": group_names[group],
        "instance": inst_names[inst], "seed": seed_no, "status": status, "finished_at": finished,
        "host": np.array(HOSTS, dtype=object)[idx % len(HOSTS)],
        "pallets": pallets, "fill_pct": fill, "seconds": secs,
    })
    frame.to_csv(path, index=False)
    del seeds


def write_in_child(path: Path, rows: int) -> float:
    """Write the campaign file from a child process (keeps this one small); return seconds."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, __file__, "--write", str(path), "--rows", str(rows)], check=True)
    return time.perf_counter() - t0


def run_child(argv: list[str], tree: Path | None = None) -> tuple[float, float, int, float]:
    """Run a command; return (wall seconds, peak resident MiB of that child, exit status, processor
    seconds of that child). `tree`: the copy of the code it runs (first on PYTHONPATH)."""
    env = None
    if tree is not None:
        env = {**os.environ, "PYTHONPATH": str(tree), "BLOCKYARD_RESIDENT": "off"}
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    err = proc.stderr.read().decode(errors="replace").strip() if proc.stderr else ""
    proc.stderr.close()
    if proc.returncode:
        print(f"  (child {' '.join(argv[:3])}... exited {proc.returncode}: {err.splitlines()[-1] if err else ''})")
    # ru_maxrss is in KiB on Linux
    return wall, usage.ru_maxrss / 1024.0, proc.returncode, usage.ru_utime + usage.ru_stime


def blockyard_cmd(tree: Path | None = None) -> list[str]:
    exe = Path(sys.executable).with_name("blockyard")
    return [str(exe)] if exe.exists() and tree is None else [sys.executable, "-m", "warehouse"]


def time_load(csv_path: Path, work: Path, tag: str, tree: Path | None = None) -> tuple[float, float, float]:
    db = work / f"load-{tag}.db"
    layout = work / "bench.toml"
    layout.write_text(LAYOUT, encoding="utf-8")
    for f in work.glob(f"load-{tag}.db*"):
        f.unlink()
    run_child(blockyard_cmd(tree) + ["init", "-w", str(db)], tree)
    wall, peak, _, cpu = run_child(blockyard_cmd(tree) + ["load", str(csv_path), "--campaign", "bench",
                                                         "--layout", str(layout), "-w", str(db)], tree)
    return wall, peak, cpu


def a_b(src: Path, work: Path, other: Path, rounds: int) -> None:
    """Interleaved rounds: reference, this tree's load, the other tree's load (the two loads'
    order alternating from round to round). Beside wall time, each load's processor time (user
    and system, both threads): on a shared machine it moves less than wall time does."""
    import statistics

    here = Path(__file__).resolve().parents[1]
    seen = []
    for k in range(max(1, rounds)):
        ref, _ = time_reference(src, work, "n")
        order = [("a", here), ("b", other)] if k % 2 == 0 else [("b", other), ("a", here)]
        took = {tag: time_load(src, work, tag, tree) for tag, tree in order}
        (wa, pa, ca), (wb, pb, cb) = took["a"], took["b"]
        seen.append((wa / ref, wb / ref, wb / wa, cb / ca, pa, pb))
        print(f"round {k + 1:<3} this {wa:5.2f} s  other {wb:5.2f} s  reference {ref:5.2f} s   this/ref {wa / ref:.2f}  "
              f"other/ref {wb / ref:.2f}  other/this {wb / wa:.3f}  processor {ca:5.2f} / {cb:5.2f} s: {cb / ca:.3f}  "
              f"peak {pa:.0f} / {pb:.0f} MiB")
    med = [statistics.median(r[i] for r in seen) for i in range(6)]
    print(f"median     this/ref {med[0]:.2f}  other/ref {med[1]:.2f}  other/this {med[2]:.3f}  "
          f"processor other/this {med[3]:.3f}  peak {med[4]:.0f} / {med[5]:.0f} MiB  (other: {other})")


def time_reference(csv_path: Path, work: Path, tag: str) -> tuple[float, float]:
    db = work / f"ref-{tag}.db"
    for f in work.glob(f"ref-{tag}.db*"):
        f.unlink()
    script = work / "reference.py"
    script.write_text(REFERENCE, encoding="utf-8")
    wall, peak, _, _ = run_child([sys.executable, str(script), str(csv_path), str(db)])
    return wall, peak


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000, help="runs in the timed file (default 1,000,000)")
    ap.add_argument("--quick", action="store_true", help="200,000 runs")
    ap.add_argument("--repeat", type=int, default=1, help="time each side this many times, keep the best")
    ap.add_argument("--no-memory", action="store_true", help="skip the 3N-run memory check")
    ap.add_argument("--dir", help="work folder (default: a temporary one, removed afterwards)")
    ap.add_argument("--against", metavar="TREE", help="A/B: another copy of the tree, loaded in the same rounds")
    ap.add_argument("--write", metavar="FILE", help=argparse.SUPPRESS)  # internal: the child that writes a file
    a = ap.parse_args()
    rows = 200_000 if a.quick else a.rows
    if a.write:
        write_campaign(Path(a.write), rows)
        return
    tmp = None
    if a.dir:
        work = Path(a.dir)
        work.mkdir(parents=True, exist_ok=True)
    else:
        tmp = tempfile.TemporaryDirectory(prefix="blockyard-bench-")
        work = Path(tmp.name)
    try:
        src = work / f"runs-{rows}.csv"
        took = write_in_child(src, rows)
        mib = src.stat().st_size / 2**20
        print(f"file       {rows:,} runs, {mib:.0f} MiB ({took:.1f} s to write)")
        if a.against:
            a_b(src, work, Path(a.against).resolve(), a.repeat)
            return
        best_load = best_ref = best_floor = float("inf")
        peak_load = peak_ref = 0.0
        for _ in range(max(1, a.repeat)):
            wall, peak = time_reference(src, work, "n")
            best_ref, peak_ref = min(best_ref, wall), max(peak_ref, peak)
            wall, peak, _ = time_load(src, work, "n")
            best_load, peak_load = min(best_load, wall), max(peak_load, peak)
            best_floor = min(best_floor, time_floor(src, work))
        print(f"load       {best_load:6.2f} s   {rows / best_load:10,.0f} runs/s   peak {peak_load:5.0f} MiB")
        print(f"reference  {best_ref:6.2f} s   {rows / best_ref:10,.0f} runs/s   peak {peak_ref:5.0f} MiB")
        print(f"ratio      load / reference = {best_load / best_ref:.2f} (aim: 1.25 or less)")
        print(f"floor      {best_floor:6.2f} s   SQLite alone storing the parsed runs in our runs table "
              f"(no start-up, reading or cell sums): {best_floor / best_ref:.2f} of the reference")
        if not a.no_memory:
            big = work / f"runs-{3 * rows}.csv"
            write_in_child(big, 3 * rows)
            wall3, peak3, _ = time_load(big, work, "3n")
            print(f"memory     peak {peak_load:.0f} MiB at {rows:,} runs, {peak3:.0f} MiB at {3 * rows:,} runs "
                  f"(x{peak3 / peak_load:.2f} for 3x the rows; load took {wall3:.1f} s, {3 * rows / wall3:,.0f} runs/s)")
            big.unlink()
    finally:
        if tmp is not None:
            tmp.cleanup()


if __name__ == "__main__":
    main()
