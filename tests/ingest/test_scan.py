"""The first pass started early, in a helper thread, by `blockyard load`: used only when the file
is the one it read, unchanged; its refusals are the same lines as a pass run in place."""
from __future__ import annotations

import os
import time

import pytest

from warehouse.errors import InputError
from warehouse.ingest import scan


def _csv(path, rows: int, extra: str = ""):
    path.write_text("solver,group,instance,seed,pallets\n" + "".join(
        f"stacker,g1,i{i},{i},{20 + i % 3}\n" for i in range(rows)) + extra, encoding="utf-8")
    return path


def _fields(info):
    return (info.sha256, info.size, info.lines, info.quote_count, info.spans_lines, info.fmt, info.name)


@pytest.fixture(autouse=True)
def _no_leftovers():
    scan._EARLY.clear()
    yield
    scan._EARLY.clear()


def test_an_early_pass_gives_what_a_pass_in_place_gives(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _csv(tmp_path / "a.csv", 500)
    scan.start_early(["-w", "x.db", "load", "a.csv", "--campaign", "c", "--layout", "l.toml"])
    assert list(scan._EARLY) == [str((tmp_path / "a.csv").resolve())]
    early = scan.first_pass_of(tmp_path / "a.csv", "a.csv")
    assert _fields(early) == _fields(scan.first_pass(tmp_path / "a.csv", "a.csv"))
    assert not scan._EARLY  # taken once


def test_a_file_changed_after_the_early_pass_is_read_again(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    f = _csv(tmp_path / "a.csv", 500)
    scan.start_early(["load", "a.csv", "--campaign", "c"])
    scan._EARLY[str(f.resolve())].done.wait()
    _csv(f, 501)  # another row: a new size and time
    later = time.time() + 5
    os.utime(f, (later, later))
    got = scan.first_pass_of(f, "a.csv")
    assert _fields(got) == _fields(scan.first_pass(f, "a.csv"))
    assert got.lines == 502


def test_a_refusal_found_early_is_the_same_line(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    f = tmp_path / "bad.csv"
    f.write_bytes(b"solver,group,instance,pallets\nstacker,g1,i1,3\nstacker,g1,i\x002,4\n")
    with pytest.raises(InputError) as in_place:
        scan.first_pass(f, "bad.csv")
    scan.start_early(["load", "bad.csv", "--campaign", "c"])
    with pytest.raises(InputError) as early:
        scan.first_pass_of(f, "bad.csv")
    assert str(early.value) == str(in_place.value)
    assert "bad.csv line 3" in str(early.value) and "NUL" in str(early.value)


@pytest.mark.parametrize("argv", [
    ["peek", "a.csv"], ["-w", "load", "peek", "a.csv"], ["load", "missing.csv"], ["load", "l.toml"], [],
])
def test_no_early_pass_for_other_commands_or_other_files(tmp_path, monkeypatch, argv):
    monkeypatch.chdir(tmp_path)
    _csv(tmp_path / "a.csv", 5)
    (tmp_path / "l.toml").write_text("", encoding="utf-8")
    scan.start_early(argv)
    assert not scan._EARLY


def test_the_command_line_loads_and_refuses_as_before(tmp_path):
    """Through the real console entry point (which starts the early pass)."""
    from faults import blockyard

    db = tmp_path / "w.db"
    assert blockyard("init", "-w", db).code == 0
    good = _csv(tmp_path / "a.csv", 300)
    res = blockyard("load", good, "--campaign", "c", "-w", db, "--json")
    assert res.code == 0, res
    assert res.json()["imports"][0]["rows_loaded"] == 300
    bad = tmp_path / "b.csv"
    bad.write_bytes(b"solver,group,instance,pallets\nstacker,g1,i1,3\nstacker,g1,i\x002,4\n")
    res = blockyard("load", bad, "--campaign", "c", "-w", db)
    assert res.code == 2 and res.err.count("\n") == 1 and "line 3" in res.err, res
