"""Instances with a content hash, and the same loads on PostgreSQL and SQLite."""
from __future__ import annotations

import json

import pytest

from conftest import ON_POSTGRES

from .kit import csv_text, jsonl_text, load_json, query, runs, write

H = "solver,group,instance,instance_hash,seed,pallets\n"


def test_same_instance_name_with_another_hash_is_a_separate_instance_and_a_warning(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "s,g1,order-7,sha1:aaa,1,30\n"))
    rep = load_json(cli, write(tmp_path / "b.csv", H + "s,g1,order-7,sha1:bbb,1,31\ns,g1,order-7,sha1:aaa,2,29\n"))
    assert rep["rows_loaded"] == 2 and rep["rows_skipped"] == 0
    assert len(rep["warnings"]) == 1
    assert "instance default/g1/order-7 has content hash 'sha1:bbb' here but 'sha1:aaa' elsewhere" in rep["warnings"][0]
    got = query(location, "SELECT name, content_hash FROM instances ORDER BY content_hash")
    assert got == [("order-7", "sha1:aaa"), ("order-7", "sha1:bbb")]
    # the run with seed 1 on the other content is a different run, not a repeat
    assert query(location, "SELECT count(*) FROM runs") == [(3,)]


def test_the_same_hash_twice_is_the_same_instance(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "s,g1,order-7,sha1:aaa,1,30\n"))
    rep = load_json(cli, write(tmp_path / "b.csv", H + "s,g1,order-7,sha1:aaa,2,31\n"))
    assert rep["warnings"] == []
    assert query(location, "SELECT count(*) FROM instances") == [(1,)]


def test_warning_shows_in_text_output(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "s,g1,order-7,,1,30\n"))
    res = cli("load", str(write(tmp_path / "b.csv", H + "s,g1,order-7,sha1:bbb,1,31\n")), "--campaign", "c")
    assert res.code == 0
    assert "caution  instance default/g1/order-7 has content hash 'sha1:bbb' here but '(none)' elsewhere" in res.out


def _inventory(cli, warehouse=None) -> dict:
    args = ["inventory", "--json"]
    res = cli(*args, warehouse=warehouse)
    assert res.code == 0, res
    doc = json.loads(res.out)
    doc.pop("warehouse")
    return doc


@pytest.mark.skipif(not ON_POSTGRES, reason="runs in the PostgreSQL pass (BLOCKYARD_TEST_URL)")
def test_postgresql_and_sqlite_hold_the_same_after_the_same_loads(cli, location, tmp_path):
    from warehouse.store.connect import init_warehouse

    lite = str(tmp_path / "lite.db")
    init_warehouse(lite).close()
    files = [
        write(tmp_path / "a.csv", csv_text(runs(40))),
        write(tmp_path / "b.jsonl", jsonl_text(runs(30, version="1.7"))),
        write(tmp_path / "c.csv", csv_text(runs(45))),  # repeats 40 runs of a.csv, adds 5
        write(tmp_path / "d.csv", "solver,group,instance,seed,status,pallets\ns,g1,x,1,ok,3\ns,g1,x,2,ok,bad\n"),
    ]
    for where in (None, lite):
        for f in files:
            res = cli("load", str(f), "--campaign", "c", "--skip-bad", "--rejects", str(tmp_path / "rej.csv"), warehouse=where)
            assert res.code == 0, res
    inv = _inventory(cli)
    assert inv["runs"] == 40 + 30 + 5 + 1 and inv["imports"] == 4
    assert inv == _inventory(cli, lite)
    for kind in ("solvers", "groups", "imports", "metrics", "hosts"):
        pg = json.loads(cli("inventory", kind, "--json").out)[f"{kind}_list"]
        sl = json.loads(cli("inventory", kind, "--json", warehouse=lite).out)[f"{kind}_list"]
        if kind == "imports":
            for rows in (pg, sl):
                for r in rows:
                    r.pop("loaded at", None)
        assert pg == sl, kind
    sums = "SELECT count(*), sum(seed), sum(status), sum(finished_at), sum(v1), sum(v2) FROM runs"
    assert query(location, sums) == query(lite, sums)


def test_many_new_instances_in_one_file_keep_their_names_and_runs(cli, location, tmp_path):
    # SQLite writes new instances several hundred to a statement: 1,203 of them fill two whole
    # statements and part of a third; every run must point at the instance its row names
    n = 1203
    body = "".join(f"s,g{k % 7},inst-{k},{k},{k % 50}\n" for k in range(n))
    rep = load_json(cli, write(tmp_path / "many.csv", "solver,group,instance,seed,pallets\n" + body))
    assert rep["rows_loaded"] == n
    got = query(location, "SELECT i.name, g.name, r.seed FROM runs r JOIN instances i ON i.id = r.instance_id "
                          "JOIN groups g ON g.id = i.group_id ORDER BY r.seed")
    assert got == [(f"inst-{k}", f"g{k % 7}", k) for k in range(n)]
    assert query(location, "SELECT count(*), count(DISTINCT name) FROM instances") == [(n, n)]
