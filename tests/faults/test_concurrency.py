"""Several processes on one warehouse at once: every loader and every reader succeeds.

Loaders are separate `python -m warehouse load` processes; the reader is a separate process
that runs inventory, peek and blocktest through the command functions in a loop (blocktest also
writes: it keeps each analysis in the ledger). Nobody sees "database is locked": on SQLite
writers queue behind a busy timeout, on PostgreSQL behind a table lock.
"""
from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from itertools import combinations

import pytest

from conftest import ON_POSTGRES, run_counts

from . import blockyard, cells_agree, clean_env, command, in_process, runs_csv, sql

# a size times 2**k: every subset of the four files has its own total, so each count a reader sees
# tells exactly which loads had committed
SIZES = (10_000, 20_000, 40_000, 80_000) if not ON_POSTGRES else (5_000, 10_000, 20_000, 40_000)  # COPY is slower per row
BASE = 2_000

READER = textwrap.dedent("""
    import io, json, os, sys
    from sqlalchemy import text
    from warehouse.front.cli import run
    from warehouse.store.connect import open_warehouse

    location, stop, report, ready = sys.argv[1:5]
    seen = []

    def cli(*argv):
        out, err = io.StringIO(), io.StringIO()
        code = run(["-w", location, *argv], out=out, err=err)
        return code, out.getvalue(), err.getvalue()

    rounds = 0
    while not os.path.exists(stop) or rounds < 3:
        rounds += 1
        code, out, err = cli("inventory", "--json")
        seen.append({"cmd": "inventory", "code": code, "err": err,
                     "runs": json.loads(out)["runs"] if code == 0 else None})
        wh = open_warehouse(location)
        try:
            with wh.engine.connect() as c:
                seen.append({"cmd": "count", "code": 0, "err": "",
                             "runs": c.execute(text("SELECT count(*) FROM runs")).scalar()})
        finally:
            wh.close()
        for argv in (("peek", "--slice", "campaign=base", "--metric", "pallets", "--json"),
                     ("blocktest", "--slice", "campaign=base", "--metric", "pallets", "--json")):
            code, out, err = cli(*argv)
            seen.append({"cmd": argv[0], "code": code, "err": err, "runs": None})
        if rounds == 1:
            open(ready, "w").close()
    with open(report, "w") as fh:
        json.dump(seen, fh)
""")


def wait_for(flag, proc, timeout: float = 120) -> None:
    """Until the reader has done one round (its imports are slow), so that it reads while loads run."""
    import time

    end = time.monotonic() + timeout
    while not flag.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < end, "the reader never got going"
        time.sleep(0.05)


def subset_sums(sizes) -> set[int]:
    return {sum(c) for k in range(len(sizes) + 1) for c in combinations(sizes, k)}


def no_lock_talk(text: str) -> None:
    low = text.lower()
    assert "database is locked" not in low and "locked" not in low and "busy" not in low, text
    assert "Traceback" not in text, text


@pytest.fixture
def base(location, tmp_path):
    """A warehouse holding a small campaign 'base', so that the reader's analyses have data from the start."""
    res = in_process(location, "load", runs_csv(tmp_path / "base.csv", BASE, instances=100, seed=7),
                     "--campaign", "base")
    assert res.code == 0, res
    return location


def test_four_loaders_and_a_reader_at_once(base, tmp_path):
    location = base
    files = [runs_csv(tmp_path / f"part{i}.csv", n, seed=100 + i) for i, n in enumerate(SIZES)]
    script = tmp_path / "reader.py"
    script.write_text(READER, encoding="utf-8")
    stop, report, ready = tmp_path / "stop", tmp_path / "seen.json", tmp_path / "ready"
    reader = subprocess.Popen([sys.executable, str(script), location, str(stop), str(report), str(ready)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
    wait_for(ready, reader)
    loaders = [subprocess.Popen(command("load", f, "--campaign", f"part{i}", "-w", location, "--json"),
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
               for i, f in enumerate(files)]
    outcomes = [p.communicate(timeout=600) + (p.returncode,) for p in loaders]
    stop.write_text("")
    r_out, r_err = reader.communicate(timeout=600)

    for (out, err, code), n in zip(outcomes, SIZES):
        no_lock_talk(out + err)
        assert code == 0, err
        doc = json.loads(out)["imports"][0]
        assert (doc["status"], doc["rows_loaded"]) == ("loaded", n)
    no_lock_talk(r_out + r_err)
    assert reader.returncode == 0, r_err
    seen = json.loads(report.read_text())
    for s in seen:
        no_lock_talk(s["err"])
        assert s["code"] == 0, s
    # every count the reader saw is the base plus a whole number of files: no load was seen half done
    allowed = {BASE + t for t in subset_sums(SIZES)}
    for kind in ("inventory", "count"):
        counts = [s["runs"] for s in seen if s["cmd"] == kind]
        assert counts and set(counts) <= allowed, (kind, sorted(set(counts) - allowed))
        assert counts == sorted(counts)  # and never went backwards
    assert run_counts(location)["runs"] == BASE + sum(SIZES)
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == BASE + sum(SIZES)
    assert sql(location, "SELECT count(*) FROM imports")[0][0] == 1 + len(SIZES)
    cells_agree(location)


def test_the_same_file_loaded_by_four_processes_at_once_goes_in_once(location, tmp_path):
    path = runs_csv(tmp_path / "same.csv", 20_000, seed=3)
    procs = [subprocess.Popen(command("load", path, "--campaign", "c", "-w", location, "--json"),
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
             for _ in range(4)]
    results = [p.communicate(timeout=600) + (p.returncode,) for p in procs]
    statuses = []
    for out, err, code in results:
        no_lock_talk(out + err)
        assert code == 0, err
        statuses.append(json.loads(out)["imports"][0]["status"])
    assert sorted(statuses) == ["duplicate"] * 3 + ["loaded"]
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 20_000
    assert sql(location, "SELECT count(*) FROM imports")[0][0] == 1
    cells_agree(location)


def test_overlapping_files_into_one_campaign_at_once_store_each_run_once(location, tmp_path):
    # seeds 0-9 and 5-14 of the same 500 instances x 2 solvers: seeds 5-9 are in both files
    a = runs_csv(tmp_path / "a.csv", 10_000, instances=500, first_seed=0, seed=1)
    b = runs_csv(tmp_path / "b.csv", 10_000, instances=500, first_seed=5, seed=2)
    procs = [subprocess.Popen(command("load", f, "--campaign", "c", "-w", location, "--json"),
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
             for f in (a, b)]
    docs = []
    for p in procs:
        out, err = p.communicate(timeout=600)
        no_lock_talk(out + err)
        assert p.returncode == 0, err
        docs.append(json.loads(out)["imports"][0])
    union, overlap = 15 * 1000, 5 * 1000
    assert sorted(d["rows_skipped"] for d in docs) == [0, overlap]
    assert sum(d["rows_loaded"] for d in docs) == union
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == union
    assert run_counts(location)["runs"] == union
    cells_agree(location)


@pytest.mark.slow
def test_eight_loaders_and_two_readers_three_times_over(location, tmp_path):
    res = in_process(location, "load", runs_csv(tmp_path / "base.csv", BASE, instances=100, seed=7),
                     "--campaign", "base")
    assert res.code == 0, res
    script = tmp_path / "reader.py"
    script.write_text(READER, encoding="utf-8")
    total = BASE
    for round_ in range(3):
        stop = tmp_path / f"stop{round_}"
        readers = [subprocess.Popen([sys.executable, str(script), location, str(stop), str(tmp_path / f"seen{round_}{k}.json"),
                                     str(tmp_path / f"ready{round_}{k}")],
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
                   for k in range(2)]
        for k, r in enumerate(readers):
            wait_for(tmp_path / f"ready{round_}{k}", r)
        sizes = [3_000 + 1_000 * i for i in range(8)]
        loaders = [subprocess.Popen(command("load", runs_csv(tmp_path / f"r{round_}p{i}.csv", n, seed=1000 * round_ + i),
                                            "--campaign", f"r{round_}p{i}", "-w", location),
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=clean_env())
                   for i, n in enumerate(sizes)]
        for p in loaders:
            out, err = p.communicate(timeout=900)
            no_lock_talk(out + err)
            assert p.returncode == 0, err
        stop.write_text("")
        for k, r in enumerate(readers):
            out, err = r.communicate(timeout=900)
            no_lock_talk(out + err)
            assert r.returncode == 0, err
            for s in json.loads((tmp_path / f"seen{round_}{k}.json").read_text()):
                no_lock_talk(s["err"])
                assert s["code"] == 0, s
        total += sum(sizes)
        assert sql(location, "SELECT count(*) FROM runs")[0][0] == total
    ok = blockyard("inventory", "--json", "-w", location)
    assert ok.code == 0 and ok.json()["runs"] == total
    cells_agree(location)
