"""Shared helpers for the benchmarks: generated campaign files and timed subprocesses."""
from __future__ import annotations

import os
import resource
import subprocess
import sys
import time
from pathlib import Path

PY = sys.executable
ROOT = Path(__file__).resolve().parents[1]


def blockyard(*args: str, check: bool = True, resident: str | None = None) -> tuple[float, int, str]:
    """Run `python -m warehouse ARGS` as its own process: (wall seconds, peak RSS in MiB, stdout).

    With `resident` (a runtime folder), the command goes to the resident process there, if one
    runs; without, it never does (BLOCKYARD_RESIDENT=off), whatever the user has running.
    """
    return timed([PY, "-m", "warehouse", *args], check=check, resident=resident)


def timed(cmd: list[str], check: bool = True, stdin: str | None = None,
          resident: str | None = None) -> tuple[float, int, str]:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "BLOCKYARD_RESIDENT": "off"}
    # as an installed program runs: from its compiled files (a shell that sets this variable would
    # make every start compile the package from source, 30 ms more than a user ever waits)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    if resident:
        env.pop("BLOCKYARD_RESIDENT")
        env["BLOCKYARD_RUNTIME_DIR"] = resident
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, input=stdin, cwd=ROOT, env=env)
    wall = time.perf_counter() - t
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if check and proc.returncode != 0:
        raise SystemExit(f"benchmark: {' '.join(cmd[:6])} failed ({proc.returncode}): {proc.stderr.strip()[:500]}")
    # ru_maxrss of children is the largest so far; report it only when this child raised it
    return wall, (peak // 1024 if peak > before else -1), proc.stdout


def peak_rss_mib(cmd: list[str]) -> int:
    """Peak resident memory of one command, measured by running it under a fresh Python parent."""
    code = ("import resource,subprocess,sys;subprocess.run(sys.argv[1:],check=True,stdout=subprocess.DEVNULL);"
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    out = subprocess.run([PY, "-c", code, *cmd], capture_output=True, text=True, cwd=ROOT,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    if out.returncode != 0:
        raise SystemExit(f"benchmark: {' '.join(cmd[:6])} failed: {out.stderr.strip()[:500]}")
    return int(out.stdout.strip()) // 1024


def write_campaign(path: Path, rows: int, night: int, treatments: int = 4, seeds: int = 10,
                   groups: int = 100) -> None:
    """A night of runs: `treatments` versions x rows/(treatments*seeds) instances x `seeds` seeds.

    The instances are the same every night (grouped into `groups` groups over 4 families), the
    seeds differ, so nights can be loaded as separate campaigns or concatenated into one file.
    """
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pacsv

    rng = np.random.default_rng(1000 + night)
    inst = max(rows // (treatments * seeds), 1)
    n = treatments * inst * seeds
    t = np.repeat(np.arange(treatments), inst * seeds)
    i = np.tile(np.repeat(np.arange(inst), seeds), treatments)
    s = np.tile(np.arange(seeds), treatments * inst) + night * 1000
    g = i % groups
    fam = np.array(["mixed-sku", "uniform-cartons", "fragile-top", "oversize"])[g % 4]
    size = 20 + (g // 4) * 0.8
    status = np.where(rng.random(n) < 0.01, "timeout", "ok")
    pallets = np.round(size * (1 - 0.008 * t) * (1 + 0.03 * ((i * 7) % 5 - 2) / 2) + rng.normal(0, 0.6, n), 2)
    pallets = np.where(status == "ok", pallets, np.nan)
    versions = np.array([f"1.{4 + k}" for k in range(treatments)])
    table = pa.table({
        "campaign": np.full(n, f"night-{night:02d}"), "solver": np.full(n, "stacker"), "version": versions[t],
        "family": fam, "group": np.char.add("g", (g // 4).astype(str)),
        "instance": np.char.add("inst-", i.astype(str)), "seed": s, "status": status,
        "finished_at": np.full(n, f"2026-11-{night:02d}T03:00:00Z"),
        "host": np.where(t % 2 == 0, "rack-a", "rack-b"), "pallets": pa.array(pallets, mask=np.isnan(pallets)),
        "fill_pct": np.round(80 + rng.normal(0, 3, n), 2), "seconds": np.round(np.abs(rng.normal(10, 2, n)), 3),
    })
    pacsv.write_csv(table, str(path), pacsv.WriteOptions(quoting_style="none"))
