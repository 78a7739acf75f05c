"""The first pass started early, in a helper thread, by `blockyard load`: used only when the file
is the one it read, unchanged; its refusals are the same lines as a pass run in place."""
from __future__ import annotations

import os
import time

import pytest

from warehouse.errors import InputError
from warehouse.ingest import early, scan


def _csv(path, rows: int, extra: str = ""):
    path.write_text("solver,group,instance,seed,pallets\n" + "".join(
        f"stacker,g1,i{i},{i},{20 + i % 3}\n" for i in range(rows)) + extra, encoding="utf-8")
    return path


def _fields(info):
    return (info.sha256, info.size, info.lines, info.quote_count, info.spans_lines, info.fmt, info.name)


@pytest.fixture(autouse=True)
def _no_leftovers():
    early._EARLY.clear()
    early._EARLY_READS.clear()
    yield
    early._EARLY.clear()
    early._EARLY_READS.clear()


def test_an_early_pass_gives_what_a_pass_in_place_gives(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _csv(tmp_path / "a.csv", 500)
    early.start_early(["-w", "x.db", "load", "a.csv", "--campaign", "c", "--layout", "l.toml"])
    assert list(early._EARLY) == [str((tmp_path / "a.csv").resolve())]
    got = early.first_pass_of(tmp_path / "a.csv", "a.csv")
    assert _fields(got) == _fields(scan.first_pass(tmp_path / "a.csv", "a.csv"))
    assert not early._EARLY  # taken once


def test_a_file_changed_after_the_early_pass_is_read_again(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    f = _csv(tmp_path / "a.csv", 500)
    early.start_early(["load", "a.csv", "--campaign", "c"])
    early._EARLY[str(f.resolve())].done.wait()
    _csv(f, 501)  # another row: a new size and time
    later = time.time() + 5
    os.utime(f, (later, later))
    got = early.first_pass_of(f, "a.csv")
    assert _fields(got) == _fields(scan.first_pass(f, "a.csv"))
    assert got.lines == 502


def test_a_refusal_found_early_is_the_same_line(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    f = tmp_path / "bad.csv"
    f.write_bytes(b"solver,group,instance,pallets\nstacker,g1,i1,3\nstacker,g1,i\x002,4\n")
    with pytest.raises(InputError) as in_place:
        scan.first_pass(f, "bad.csv")
    early.start_early(["load", "bad.csv", "--campaign", "c"])
    with pytest.raises(InputError) as found:
        early.first_pass_of(f, "bad.csv")
    assert str(found.value) == str(in_place.value)
    assert "bad.csv line 3" in str(found.value) and "NUL" in str(found.value)


@pytest.mark.parametrize("argv", [
    ["peek", "a.csv"], ["-w", "load", "peek", "a.csv"], ["load", "missing.csv"], ["load", "l.toml"], [],
])
def test_no_early_pass_for_other_commands_or_other_files(tmp_path, monkeypatch, argv):
    monkeypatch.chdir(tmp_path)
    _csv(tmp_path / "a.csv", 5)
    (tmp_path / "l.toml").write_text("", encoding="utf-8")
    early.start_early(argv)
    assert not early._EARLY


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


# --- the first file parsed early too -------------------------------------------------------------

def _load_both_ways(tmp_path, monkeypatch, location, data: bytes, name: str = "a.csv", chunk_rows: int | None = None):
    """The same file loaded with the early parse into `location`, and without it into a second
    warehouse: (result of each, whether the early parse was taken)."""
    from warehouse.front.cli import run
    from warehouse.ingest import sources

    import io

    if chunk_rows:  # several chunks from a small file
        monkeypatch.setattr(sources, "CHUNK_ROWS", chunk_rows)
        monkeypatch.setattr(sources, "FIRST_CHUNK_ROWS", chunk_rows)
    monkeypatch.chdir(tmp_path)
    (tmp_path / name).write_bytes(data)
    taken = []
    real = early.take_early_read

    def spy(info):
        got = real(info)
        taken.append(got is not None)
        return got

    monkeypatch.setattr(early, "take_early_read", spy)
    out = []
    for where, started in ((location, True), (str(tmp_path / "plain.db"), False)):
        if not started:
            assert run(["init", "-w", where], out=io.StringIO(), err=io.StringIO()) == 0
        argv = ["-w", where, "load", name, "--campaign", "c", "--json"]
        if started:
            early.start_early(argv)
        o, e = io.StringIO(), io.StringIO()
        code = run(argv, out=o, err=e)
        out.append((code, o.getvalue(), e.getvalue()))
    return out, taken


def test_an_early_parse_loads_what_the_load_reads_itself(tmp_path, monkeypatch, location):
    from .kit import stored_runs

    text = "solver,group,instance,seed,status,pallets\n" + "".join(
        f"stacker,g{i % 4},i{i % 37},{i},{'timeout' if i % 11 == 0 else 'ok'},{'' if i % 11 == 0 else 20 + i % 5}\n"
        for i in range(2_000))
    (early, plain), taken = _load_both_ways(tmp_path, monkeypatch, location, text.encode(), chunk_rows=300)
    assert taken == [True, False]
    assert early[0] == plain[0] == 0, (early, plain)
    assert stored_runs(location) == stored_runs(str(tmp_path / "plain.db"))


@pytest.mark.parametrize("tail", [b"stacker,g1,i9\n", b"stacker,g1,i9,9,ok,3,extra\n", b"stacker,g\xff1,i9,9,ok,3\n"],
                         ids=["too-few-fields", "too-many-fields", "not-utf8"])
def test_an_early_parse_refuses_with_the_same_line(tmp_path, monkeypatch, location, tail):
    data = ("solver,group,instance,seed,status,pallets\n" + "".join(
        f"stacker,g1,i{i},{i},ok,{i}\n" for i in range(1_000))).encode() + tail
    (early, plain), taken = _load_both_ways(tmp_path, monkeypatch, location, data, chunk_rows=200)
    assert taken[0] is True
    assert early[0] == plain[0] == 2, (early, plain)
    assert early[1] == plain[1] and "line 1002" in early[1], (early, plain)
