"""`blockyard load` in its own process does not import pandas (pyarrow would, for a probe, at a
fifth of a second of start-up): every format, a refused file, --skip-bad, --dry-run and PostgreSQL
load the same as in a process that has pandas (the other ingest tests), and the command still
names the line of a bad value. Each case runs the real console entry point."""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

from .kit import csv_text, jsonl_text, parquet, runs, write

PROBE = r"""
import sys
import warehouse.front.cli as cli
cli._leave = sys.exit  # the real entry point, ending with an exception so that the probe can report
try:
    cli.main()
finally:
    sys.stderr.write("\npandas-imported=%s\n" % ("pandas" in sys.modules))
"""

ROWS = runs(6)


def _run(*argv):
    from faults import clean_env

    p = subprocess.run([sys.executable, "-c", PROBE, *map(str, argv)], capture_output=True, text=True,
                       env=clean_env(BLOCKYARD_RESIDENT="off"), timeout=300)
    tail = p.stderr.rstrip().splitlines()[-1]
    return p.returncode, p.stdout, p.stderr, tail


@pytest.mark.parametrize("name,maker", [
    ("runs.csv", lambda p: write(p, csv_text(ROWS))),
    ("runs.tsv.gz", lambda p: write(p, csv_text(ROWS, delim="\t"), gz=True)),
    ("runs.jsonl", lambda p: write(p, jsonl_text(ROWS))),
    ("runs.parquet", lambda p: parquet(p, ROWS)),
])
def test_each_format_loads_without_pandas(tmp_path, wh_location, name, maker):
    where = wh_location
    code, _, err, _ = _run("init", "-w", where)
    assert code == 0, err
    path = maker(tmp_path / name)
    code, out, err, tail = _run("load", path, "--campaign", "c", "-w", where, "--json")
    assert code == 0, err
    assert tail == "pandas-imported=False"
    rep = json.loads(out)["imports"][0]
    assert (rep["status"], rep["rows_read"], rep["rows_loaded"], rep["rows_rejected"]) == ("loaded", 6, 6, 0)


def test_refusals_skip_bad_and_dry_run_without_pandas(tmp_path, wh_location):
    where = wh_location
    assert _run("init", "-w", where)[0] == 0
    bad = write(tmp_path / "bad.csv", csv_text(ROWS).replace(",ok,", ",exploded,", 1))
    code, _, err, tail = _run("load", bad, "--campaign", "c", "-w", where)
    assert code == 2 and tail == "pandas-imported=False"
    assert "bad.csv line 2" in err and "unknown status 'exploded'" in err, err
    code, out, err, tail = _run("load", bad, "--campaign", "c", "-w", where, "--skip-bad", "--json")
    assert code == 0 and tail == "pandas-imported=False", err
    rep = json.loads(out)["imports"][0]
    assert (rep["rows_loaded"], rep["rows_rejected"]) == (5, 1)
    assert (tmp_path / "bad.csv.rejects.csv").exists()
    good = write(tmp_path / "more.csv", csv_text(runs(4, start_seed=50)))
    code, out, err, tail = _run("load", good, "--campaign", "c", "-w", where, "--dry-run", "--json")
    assert code == 0 and tail == "pandas-imported=False", err
    assert json.loads(out)["imports"][0]["status"] == "checked"


def test_a_load_keeps_its_arrays_off_huge_pages_and_gives_the_switches_back(tmp_path, wh):
    """ingest/devices.SmallPages: during a load, Arrow allocates from the C library's allocator and
    numpy asks for no huge pages; after it, a running process (shell, notebook) has its own
    settings back. The switches are the libraries' own (numpy's `_set_madvise_hugepage`, whose
    return value is the setting before; pyarrow's `set_memory_pool`)."""
    import pyarrow as pa

    from warehouse.ingest.load import load_file

    try:
        from numpy._core import multiarray
    except ImportError:  # numpy 1.x
        from numpy.core import multiarray
    pool_was = pa.default_memory_pool()
    pa.set_memory_pool(pa.mimalloc_memory_pool())
    madvise_was = multiarray._set_madvise_hugepage(True)
    seen = []

    def progress(done, total):
        now = multiarray._set_madvise_hugepage(False)  # reads it (and leaves it as the load set it)
        seen.append((pa.default_memory_pool().backend_name, now))

    try:
        rep = load_file(wh, write(tmp_path / "a.csv", csv_text(runs(40))), "c", progress=progress)
        assert rep.rows_loaded == 40 and seen
        assert all(s == ("system", False) for s in seen), seen
        assert pa.default_memory_pool().backend_name == "mimalloc"
        assert multiarray._set_madvise_hugepage(True) is True
    finally:  # this test process's own settings, as they were
        pa.set_memory_pool(pool_was)
        multiarray._set_madvise_hugepage(madvise_was)


def test_the_command_sets_both_switches_before_the_libraries_load(tmp_path, wh_location):
    probe = ("import os, sys\nimport warehouse.front.cli as cli\ncli._leave = sys.exit\ntry:\n    cli.main()\n"
             "finally:\n    import pyarrow as pa\n"
             "    sys.stderr.write('\\n%s %s\\n' % (pa.default_memory_pool().backend_name, "
             "os.environ.get('NUMPY_MADVISE_HUGEPAGE')))\n")
    from faults import clean_env

    subprocess.run([sys.executable, "-m", "warehouse", "init", "-w", wh_location], check=True, capture_output=True,
                   env=clean_env(BLOCKYARD_RESIDENT="off"), timeout=300)
    path = write(tmp_path / "a.csv", csv_text(ROWS))
    p = subprocess.run([sys.executable, "-c", probe, "load", str(path), "--campaign", "c", "-w", wh_location],
                       capture_output=True, text=True, env=clean_env(BLOCKYARD_RESIDENT="off"), timeout=300)
    assert p.returncode == 0, p.stderr
    assert p.stderr.rstrip().splitlines()[-1] == "system 0"
