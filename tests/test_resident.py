"""The resident process: the same output, streams and exit status as a command run on its own.

Each test starts its own resident in a private folder of its own (BLOCKYARD_RUNTIME_DIR) and
compares what `python -m warehouse ...` prints through it with what the same command prints
with BLOCKYARD_RESIDENT=off, on the test's own warehouse (SQLite or PostgreSQL).
"""
from __future__ import annotations

import json
import os
import random
import stat
import subprocess
import sys
import time

import pytest

from warehouse.front import handoff as resident

pytestmark = pytest.mark.skipif(not resident.supported(), reason="the resident process is for Linux")

from test_collapse import write_runs  # noqa: E402
from test_collapse_in_sql import campaign_runs  # noqa: E402


def blockyard(env, *argv, cwd=None, timeout=120):
    return subprocess.run([sys.executable, "-m", "warehouse", *argv], capture_output=True, text=True,
                          env=env, cwd=cwd, timeout=timeout)


@pytest.fixture
def runtime(tmp_path):
    env = dict(os.environ, BLOCKYARD_RUNTIME_DIR=str(tmp_path / "rt"))
    env.pop("BLOCKYARD_RESIDENT", None)
    yield env
    blockyard(env, "resident", "stop")
    status = blockyard(env, "resident", "status", "--json")
    assert json.loads(status.stdout)["running"] is False


@pytest.fixture
def stocked(location, tmp_path, cli):
    rng = random.Random(7)
    r = cli("load", write_runs(tmp_path / "runs.csv", campaign_runs(rng, ["1.0", "2.0", "3.0"], fail=0.05, skip=0.0)),
            "--campaign", "oct")
    assert r.code == 0, r
    return location


def served(env) -> int:
    return json.loads(blockyard(env, "resident", "status", "--json").stdout).get("served", 0)


def kept_as_n(text: str) -> str:
    import re

    return re.sub(r"kept as analysis \d+", "kept as analysis N", text)


def without(env):
    return dict(env, BLOCKYARD_RESIDENT="off")


def test_commands_through_the_resident_print_what_they_print_on_their_own(runtime, stocked):
    r = blockyard(runtime, "resident", "start", "--idle", "5", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["started"] is True
    cases = [
        ("blocktest", "--slice", "campaign=oct", "--metric", "pallets", "--json"),
        ("versus", "stk@1.0", "--slice", "campaign=oct", "--metric", "seconds", "--json"),
        ("peek", "--slice", "family=f1", "--metric", "pallets"),
        ("inventory", "--json"),
        ("blocktest", "--metric", "nope"),  # a mistake: the same one line and exit status 2
        ("versus", "--metric", "pallets"),  # an argument missing: argparse's refusal, the same way
    ]
    for argv in cases:
        before = served(runtime)
        here = blockyard(runtime, "-w", stocked, *argv)
        assert served(runtime) == before + 1, argv  # the resident ran it
        alone = blockyard(without(runtime), "-w", stocked, *argv)
        assert here.returncode == alone.returncode, (argv, here.stderr, alone.stderr)
        assert here.stderr == alone.stderr, argv
        if "--json" in argv:
            a, b = json.loads(here.stdout), json.loads(alone.stdout)
            a.pop("analysis_id", None), b.pop("analysis_id", None)
            assert a == b, argv
        else:  # the same text, but for the ledger number a kept analysis gets
            assert kept_as_n(here.stdout) == kept_as_n(alone.stdout), argv
    assert blockyard(runtime, "-w", stocked, "blocktest", "--metric", "nope").returncode == 2


def test_the_callers_folder_and_environment_are_the_ones_used(runtime, stocked, tmp_path):
    if "://" in stocked:
        pytest.skip("a relative warehouse path is a file's")
    assert blockyard(runtime, "resident", "start").returncode == 0
    rel = os.path.relpath(stocked, tmp_path)
    env = dict(runtime, BLOCKYARD_WAREHOUSE=rel)  # found through the caller's environment and folder
    here = blockyard(env, "inventory", "--json", cwd=tmp_path)
    assert here.returncode == 0, here.stderr
    assert json.loads(here.stdout)["runs"] > 0
    assert served(runtime) == 1
    # and from another folder the same relative name is another (missing) warehouse
    elsewhere = blockyard(env, "inventory", cwd=tmp_path / "rt")
    assert elsewhere.returncode != 0


def test_the_resident_folder_and_socket_are_private(runtime, stocked):
    assert blockyard(runtime, "resident", "start").returncode == 0
    from pathlib import Path

    folder = Path(runtime["BLOCKYARD_RUNTIME_DIR"])
    assert stat.S_IMODE(folder.stat().st_mode) == 0o700
    assert stat.S_IMODE((folder / "resident.sock").stat().st_mode) & 0o077 == 0


def test_a_second_start_finds_the_first_and_stop_stops_it(runtime, stocked):
    first = json.loads(blockyard(runtime, "resident", "start", "--json").stdout)
    second = json.loads(blockyard(runtime, "resident", "start", "--json").stdout)
    assert first["started"] is True and second["started"] is False and second["pid"] == first["pid"]
    r = blockyard(runtime, "resident", "stop", "--json")
    assert json.loads(r.stdout)["stopped"] is True
    assert json.loads(blockyard(runtime, "resident", "status", "--json").stdout)["running"] is False
    # with none running, commands run on their own
    alone = blockyard(runtime, "-w", stocked, "inventory", "--json")
    assert alone.returncode == 0 and json.loads(alone.stdout)["runs"] > 0


def test_a_caller_with_another_blockyard_runs_the_command_itself(runtime, stocked):
    assert blockyard(runtime, "resident", "start").returncode == 0
    other = dict(runtime, BLOCKYARD_RESIDENT_STAMP="another installation")
    r = blockyard(other, "-w", stocked, "inventory", "--json")
    assert r.returncode == 0 and json.loads(r.stdout)["runs"] > 0  # ran here
    assert served(runtime) == 0  # not there, and the resident stays up for its own callers
    assert blockyard(runtime, "-w", stocked, "inventory").returncode == 0
    assert served(runtime) == 1


def test_a_resident_whose_files_changed_stops_and_the_caller_runs_the_command(runtime, stocked):
    import warehouse

    assert blockyard(runtime, "resident", "start").returncode == 0
    source = os.path.join(os.path.dirname(warehouse.__file__), "__init__.py")
    st = os.stat(source)
    try:
        os.utime(source, ns=(st.st_atime_ns, time.time_ns() + 10**10))  # the newest file, as after an upgrade
        r = blockyard(runtime, "-w", stocked, "inventory", "--json")
        assert r.returncode == 0 and json.loads(r.stdout)["runs"] > 0
        deadline = time.monotonic() + 10
        while json.loads(blockyard(runtime, "resident", "status", "--json").stdout)["running"]:
            assert time.monotonic() < deadline, "an out-of-date resident should stop"
            time.sleep(0.1)
    finally:
        os.utime(source, ns=(st.st_atime_ns, st.st_mtime_ns))


def test_a_caller_in_a_folder_gone_runs_the_command_itself(runtime, stocked, tmp_path):
    if "://" not in stocked:
        stocked = os.path.abspath(stocked)
    assert blockyard(runtime, "resident", "start").returncode == 0
    gone = tmp_path / "gone"
    gone.mkdir()
    code = ("import os, subprocess, sys; os.chdir(sys.argv[1]); os.rmdir(sys.argv[1]); "
            "sys.exit(subprocess.run([sys.executable, '-m', 'warehouse', '-w', sys.argv[2], 'inventory']).returncode)")
    r = subprocess.run([sys.executable, "-c", code, str(gone), stocked], env=runtime, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert served(runtime) == 0


def test_an_idle_resident_stops_by_itself(runtime):
    assert blockyard(runtime, "resident", "start", "--idle", "0.02").returncode == 0  # 1.2 seconds
    deadline = time.monotonic() + 20
    while json.loads(blockyard(runtime, "resident", "status", "--json").stdout)["running"]:
        assert time.monotonic() < deadline
        time.sleep(0.2)


def test_commands_it_does_not_take_run_on_their_own(runtime, stocked, tmp_path):
    assert blockyard(runtime, "resident", "start").returncode == 0
    r = blockyard(runtime, "-w", stocked, "load", write_runs(tmp_path / "more.csv", campaign_runs(
        random.Random(3), ["4.0"], seeds=1)), "--campaign", "nov")
    assert r.returncode == 0, r.stderr
    assert served(runtime) == 0


@pytest.mark.parametrize("idle", ["0", "-5", "inf", "nan", "soon"])
def test_resident_mistakes_are_one_line(idle, tmp_path, monkeypatch):
    import io

    from warehouse.front.cli import run

    monkeypatch.setenv("BLOCKYARD_RUNTIME_DIR", str(tmp_path / "rt"))
    err = io.StringIO()
    assert run(["resident", "start", "--idle", idle], out=io.StringIO(), err=err) == 2
    assert err.getvalue().count("\n") == 1 and "--idle" in err.getvalue()
    assert not (tmp_path / "rt").exists()  # nothing was started
