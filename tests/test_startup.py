"""Start-up: `blockyard --help` and `inventory` import no heavy library, opening a SQLite
warehouse needs no SQLAlchemy, and each command imports only what it uses (issue 19). Which
modules a process imported is a fact a test can hold; how long it took is the benchmarks' job
(benchmarks/treatments.py prints the ratios against `python -c pass`)."""
from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import ON_POSTGRES

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("sqlalchemy", "pandas", "numpy", "scipy", "statsmodels", "matplotlib", "pyarrow", "alembic", "psycopg",
         "prompt_toolkit", "tabulate")

PROBE = r'''
import io, json, sys
from warehouse.front.cli import run
out, err = io.StringIO(), io.StringIO()
code = run(json.loads(sys.argv[1]), out=out, err=err)
print("\n" + json.dumps({"code": code, "out": out.getvalue(), "err": err.getvalue(),
                  "modules": sorted(m for m in sys.modules if "." not in m)}))
'''


def probe(*argv: str) -> dict:
    """Run one command in a fresh interpreter; what it printed and the top-level modules it imported."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), "BLOCKYARD_RESIDENT": "off"}
    p = subprocess.run([sys.executable, "-c", PROBE, json.dumps(list(argv))], capture_output=True, text=True,
                       cwd=ROOT, env=env, timeout=300)
    assert p.returncode == 0, p.stderr
    *printed, last = p.stdout.rstrip("\n").split("\n")
    doc = json.loads(last)
    doc["printed"] = "\n".join(printed)  # what argparse wrote to stdout itself (--help)
    return doc


def heavy(doc: dict) -> list[str]:
    return [m for m in HEAVY if m in doc["modules"]]


def test_help_imports_no_heavy_library():
    doc = probe("--help")
    assert doc["code"] == 0 and "blocktest" in doc["printed"]
    assert heavy(doc) == []
    doc = probe("blocktest", "--help")
    assert doc["code"] == 0 and "--metric" in doc["printed"] and heavy(doc) == []


def _load_small(cli, tmp_path) -> None:
    path = tmp_path / "runs.csv"
    rows = ["solver,version,family,group,instance,seed,pallets"]
    rows += [f"stk,{v},f1,g{g},i{g},{s},{30 + g + 0.5 * k + 0.1 * s}" for k, v in enumerate(("1.0", "2.0", "2.1"))
             for g in range(5) for s in (1, 2)]
    path.write_text("\n".join(rows) + "\n")
    assert cli("load", str(path), "--campaign", "c1").code == 0


@pytest.mark.skipif(ON_POSTGRES, reason="a server is reached through SQLAlchemy and psycopg by design")
def test_inventory_of_a_sqlite_warehouse_imports_no_heavy_library(cli, tmp_path, location):
    _load_small(cli, tmp_path)
    text, js = probe("-w", location, "inventory"), probe("-w", location, "inventory", "--json")
    assert text["code"] == 0 and js["code"] == 0
    assert heavy(text) == [] and heavy(js) == []
    assert "runs       30 (0 retracted" in text["out"]
    assert json.loads(js["out"]) == cli("inventory", "--json").json()  # the same document in-process


def test_plain_counts_equal_the_sqlalchemy_counts(cli, tmp_path, wh):
    from warehouse.select.inventory import counts, plain_counts

    _load_small(cli, tmp_path)
    assert cli("retract", "--slice", "version=2.1", "--reason", "rerun on a quiet host").code == 0
    with wh.engine.connect() as conn:
        want = counts(conn)
    if wh.is_sqlite:
        con = wh.sqlite()
        try:
            got = plain_counts(con)
        finally:
            con.close()
    else:
        raw = wh.engine.raw_connection()
        try:
            got = plain_counts(raw)
        finally:
            raw.close()
    assert got == want
    assert want["runs"] == 20 and want["retracted"] == 10 and want["treatments"] == 3


def test_a_cold_blocktest_imports_no_statsmodels(cli, tmp_path, location):
    # statsmodels was imported only for the ledger's note of library versions: 1.5 s of a cold
    # blocktest that never used it (docs/performance.md); the version is read from the metadata
    _load_small(cli, tmp_path)
    doc = probe("-w", location, "blocktest", "--slice", "campaign=c1", "--metric", "pallets", "--json")
    assert doc["code"] == 0, doc["err"]
    assert "statsmodels" not in doc["modules"]
    from importlib.metadata import version

    kept = cli("recall", str(json.loads(doc["out"])["analysis_id"]), "--json").json()
    soft = kept.get("software") or kept.get("analysis", {}).get("software")
    if soft is not None:
        assert soft["statsmodels"] == version("statsmodels")


BLOCKTESTS = r'''
import io, json, sys
import warehouse.analyses.blocktest
from warehouse.front.cli import run
seen = []
for argv in json.loads(sys.argv[1]):
    out, err = io.StringIO(), io.StringIO()
    code = run(argv, out=out, err=err)
    assert code == 0, (argv, err.getvalue())
    seen.append({"argv": argv, "modules": sorted(m for m in ("scipy.stats", "scipy.optimize", "statsmodels")
                                                  if m in sys.modules)})
print(json.dumps(seen))
'''


def _load_with_failures(tmp_path, location) -> None:
    """Four builds on six groups of two instances; builds after the first fail both runs on a few
    instances, so that the failure part has instances to compare (Cochran's Q, McNemar)."""
    from warehouse.front.cli import run

    rows = ["solver,version,family,group,instance,seed,status,pallets"]
    for k, v in enumerate(("1.0", "2.0", "2.1", "2.2")):
        for g in range(6):
            for i in range(2):
                for s in (1, 2):
                    failed = k > 0 and (k + g + i) % 5 == 0
                    rows.append(f"stk,{v},f1,g{g},g{g}-i{i},{s},{'failed' if failed else 'ok'},"
                                f"{30 + 3 * g + 0.4 * k * (1 + g % 3) + 0.1 * s + 0.3 * i}")
    path = tmp_path / "runs.csv"
    path.write_text("\n".join(rows) + "\n")
    assert run(["-w", location, "load", str(path), "--campaign", "c1"], out=io.StringIO(), err=io.StringIO()) == 0


def test_a_cold_blocktest_imports_neither_scipy_stats_nor_scipy_optimize(tmp_path, location):
    # scipy.stats and the scipy.optimize it brings were about 0.45 s of a cold blocktest's start,
    # for its residual checks alone (issue 19; docs/performance.md): analyze/lean.py holds them now.
    # Each blocktest below runs in one fresh interpreter after the one before; --pairs comes last
    # and does import scipy.stats (Tukey's studentized range), which shows the probe can tell.
    _load_with_failures(tmp_path, location)
    w = ["-w", location, "blocktest", "--metric", "pallets"]
    runs = [w, w + ["--transform", "boxcox", "--json"], w + ["--transform", "rank"], w + ["--transform", "log"],
            w + ["--design", "incomplete"], w + ["--failures", "worst"], w + ["--failures", "penalize:100"],
            w + ["--slice", "version=1.0,2.2"], w + ["--pairs", "tukey"]]
    env = {**os.environ, "PYTHONPATH": str(ROOT), "BLOCKYARD_RESIDENT": "off"}
    p = subprocess.run([sys.executable, "-c", BLOCKTESTS, json.dumps(runs)], check=False, capture_output=True, text=True,
                       cwd=ROOT, env=env, timeout=300)
    assert p.returncode == 0, p.stderr
    seen = json.loads(p.stdout.strip().splitlines()[-1])
    assert [s["modules"] for s in seen[:-1]] == [[]] * (len(runs) - 1)
    assert "scipy.stats" in seen[-1]["modules"]


def test_a_slow_cold_command_at_a_terminal_mentions_the_resident_once(tmp_path, monkeypatch):
    from warehouse.front import handoff

    if not handoff.supported():
        pytest.skip("the resident is for Linux")
    monkeypatch.setenv("BLOCKYARD_RUNTIME_DIR", str(tmp_path / "rt"))
    monkeypatch.delenv("BLOCKYARD_RESIDENT", raising=False)
    argv = ["-w", "x.db", "blocktest", "--slice", "campaign=c1"]
    assert handoff.suggestion(argv, 0.5, True) is None  # quick enough
    assert handoff.suggestion(argv, 9.0, False) is None  # a script's pipe: never
    assert handoff.suggestion(["-w", "x.db", "load", "f.csv"], 9.0, True) is None  # not a command it runs
    first = handoff.suggestion(argv, 9.0, True)
    assert first is not None and "blockyard resident start" in first and "\n" not in first
    assert handoff.suggestion(argv, 9.0, True) is None  # said once
    monkeypatch.setenv("BLOCKYARD_RUNTIME_DIR", str(tmp_path / "other"))
    monkeypatch.setenv("BLOCKYARD_RESIDENT", "off")
    assert handoff.suggestion(argv, 9.0, True) is None  # turned off: not a word
