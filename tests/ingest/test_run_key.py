"""A run appears once per campaign, with no index on the run key in SQLite (revision 0007).

A SQLite load proves its runs new from the cell summaries (none of its cells holds runs of the
campaign) and a hash of its own run keys (none twice); when a proof fails it starts over with a
unique index on the campaign's keys for the length of the load. What the user sees is the same
as with a permanent key: repeated runs in a file are named, stored ones are skipped, retracted
ones still hold their key. PostgreSQL holds no key on the whole table either (revision 0013):
a campaign's partition gets its own unique index on the live runs when a load into the
campaign, once it holds runs, needs it; the same behaviour holds there.
"""
from __future__ import annotations

import pytest

from warehouse.ingest import load, runkey
from warehouse.store import bulk

from conftest import ON_POSTGRES
from .kit import csv_text, load_json, query, refusal, runs, write
from .test_atomic import indexes

H = "solver,version,group,instance,seed,status,pallets\n"


def test_sqlite_keeps_no_run_key_and_a_load_leaves_none_behind(cli, location, tmp_path):
    before = indexes(location)
    assert "ux_runs_key" not in before  # (PostgreSQL: none on the parent since revision 0013)
    load_json(cli, write(tmp_path / "a.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(1, 7))))
    # a second file into the same campaign over stored cells: the exact way, with its own key
    rep = load_json(cli, write(tmp_path / "b.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(4, 10))))
    assert rep["rows_loaded"] == 3 and rep["rows_skipped"] == 3
    assert indexes(location) == before


def test_a_retracted_run_still_holds_its_key(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "s,1,g1,a,1,ok,10\ns,1,g1,a,2,ok,20\n"))
    assert cli("retract", "--slice", "seed=2", "--reason", "bad").code == 0
    rep = load_json(cli, write(tmp_path / "b.csv", H + "s,1,g1,a,2,ok,99\ns,1,g1,a,3,ok,30\n"))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (1, 1)
    assert query(location, "SELECT seed, v1, CASE WHEN retraction_id IS NULL THEN 0 ELSE 1 END FROM runs ORDER BY id") == \
        [(1, 10.0, 0), (2, 20.0, 1), (3, 30.0, 0)]


def test_a_new_campaign_over_the_same_cells_is_new_runs(cli, location, tmp_path):
    text = H + "s,1,g1,a,1,ok,10\ns,1,g1,a,2,ok,20\n"
    load_json(cli, write(tmp_path / "a.csv", text))
    rep = load_json(cli, write(tmp_path / "b.csv", text + "s,1,g1,a,3,ok,30\n"), campaign="other")
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (3, 0)


@pytest.mark.parametrize("rows", [20, bulk.BULK_MIN_ROWS + 500], ids=["small", "large"])
def test_a_run_twice_in_a_file_is_named_whatever_the_chunk(cli, location, tmp_path, rows):
    rs = runs(rows)
    text = csv_text(rs + [rs[3]])  # the fourth run again, on the last line (another chunk when large)
    before = query(location, "SELECT count(*) FROM runs")
    line = refusal(cli, write(tmp_path / "twice.csv", text))
    assert f"lines 5 and {rows + 2} hold the same run" in line, line
    assert query(location, "SELECT count(*) FROM runs") == before
    assert "ux_runs_key" not in indexes(location) or ON_POSTGRES


@pytest.mark.skipif(ON_POSTGRES, reason="the hash proof is SQLite's")
def test_two_runs_whose_hashes_meet_still_load_every_run(cli, location, tmp_path, monkeypatch):
    # every run hashed alike: the proof fails, and the exact way finds no run twice
    monkeypatch.setattr(runkey.RunHashes, "_mix", staticmethod(lambda z: z * 0))
    rep = load_json(cli, write(tmp_path / "a.csv", csv_text(runs(30))))
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["rows_rejected"]) == (30, 0, 0)
    assert query(location, "SELECT count(DISTINCT seed), min(id), max(id) FROM runs") == [(30, 1, 30)]


@pytest.mark.skipif(ON_POSTGRES, reason="the proofs are SQLite's")
def test_each_proof_is_what_stands_between_a_load_and_a_repeated_run(cli, location, tmp_path, monkeypatch):
    """With either proof switched off, a repeated run would be stored twice: each one is needed."""
    load_json(cli, write(tmp_path / "a.csv", H + "s,1,g1,a,1,ok,10\n"))
    monkeypatch.setattr(runkey.StoredCells, "overlaps", lambda self, s, i: False)
    load_json(cli, write(tmp_path / "b.csv", H + "s,1,g1,a,1,ok,11\n"))
    assert query(location, "SELECT count(*) FROM runs WHERE seed = 1") == [(2,)]  # stored twice
    monkeypatch.undo()
    monkeypatch.setattr(runkey.RunHashes, "repeated", lambda self: False)
    load_json(cli, write(tmp_path / "c.csv", H + "s,1,g2,b,1,ok,10\ns,1,g2,b,1,ok,12\n"), campaign="d")
    assert query(location, "SELECT count(*) FROM runs WHERE instance_id = (SELECT id FROM instances WHERE name = 'b')") == [(2,)]


@pytest.mark.skipif(ON_POSTGRES, reason="the proofs are SQLite's")
def test_a_file_past_the_hash_limit_loads_the_exact_way(cli, location, tmp_path, monkeypatch):
    # the run hashes take 8 bytes a run; past the limit the campaign's key index checks instead
    monkeypatch.setattr(runkey, "QUICK_MAX_RUNS", 10)
    made = []
    real = runkey.campaign_key
    monkeypatch.setattr(runkey, "campaign_key", lambda conn, cid, create: (made.append(create), real(conn, cid, create)))
    rep = load_json(cli, write(tmp_path / "a.csv", csv_text(runs(30))))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (30, 0)
    assert made == [True, False]  # made, and dropped before the commit
    assert "blockyard_load_key" not in indexes(location)


@pytest.mark.skipif(ON_POSTGRES, reason="SQLite's page cache")
def test_a_large_first_load_gives_the_page_cache_back(location, tmp_path):
    from warehouse.store.connect import open_warehouse

    from .test_atomic import big_csv

    w = open_warehouse(location)
    try:
        rep = load.load_file(w, big_csv(tmp_path / "big.csv", bulk.BULK_MIN_ROWS + 100), "c")
        assert rep.rows_loaded == bulk.BULK_MIN_ROWS + 100
        with w.engine.connect() as conn:  # the pooled connection the load used
            assert conn.exec_driver_sql("PRAGMA cache_size").scalar() == -65536
            assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
    finally:
        w.close()


def test_values_one_chunk_holds_alike_are_stored_as_bound_ones_would_be(cli, location, tmp_path):
    # A column with one value on every row goes into the statement as a literal (SQLite); whole
    # numbers and NULL only: a float keeps its exact double, an integer column its integer type.
    text = H + "".join(f"s,1,g1,i{k},7,ok,0.1\n" for k in range(40))  # one seed, one float value
    load_json(cli, write(tmp_path / "a.csv", text))
    got = query(location, "SELECT seed, replicate, v1, count(*) FROM runs GROUP BY seed, replicate, v1")
    assert got == [(7, 0, 0.1, 40)]
    assert query(location, "SELECT v1 = 0.1 FROM runs LIMIT 1") in ([(1,)], [(True,)])
    if not ON_POSTGRES:
        assert query(location, "SELECT DISTINCT typeof(seed), typeof(v1), typeof(host_id) FROM runs") == \
            [("integer", "real", "null")]


# --- a file loaded again into its own campaign (`load --again`, revision 0008) ------------------

def test_the_run_key_holds_live_runs_only(cli, location, tmp_path):
    # PostgreSQL: the campaign partition's unique index is partial, made by the second load into
    # the campaign (its own pg_indexes text); SQLite holds none (0007) and a load leaves none
    load_json(cli, write(tmp_path / "a.csv", H + "s,1,g1,a,1,ok,10\n"), campaign="nov")
    load_json(cli, write(tmp_path / "b.csv", H + "s,1,g1,a,2,ok,20\n"), campaign="nov")
    if not ON_POSTGRES:
        assert not [i for i in indexes(location) if "key" in i]
        return
    (cid,), = query(location, "SELECT id FROM campaigns WHERE name = 'nov'")
    (ddl,), = query(location, "SELECT indexdef FROM pg_indexes WHERE indexname = :n AND schemaname = current_schema()",
                    n=f"runs_c{cid}_key")
    assert ddl.startswith(f"CREATE UNIQUE INDEX runs_c{cid}_key ON ") and ddl.endswith(
        "USING btree (solver_id, instance_id, seed, replicate) WHERE (retraction_id IS NULL)"), ddl


def _reloaded(cli, tmp_path):
    """nov: import 1 (seeds 1 and 2) retracted, and the same file loaded again into nov (import 2)."""
    path = write(tmp_path / "a.csv", H + "s,1,g1,a,1,ok,10\ns,1,g1,a,2,ok,20\n")
    load_json(cli, path, campaign="nov")
    assert cli("retract", "--slice", "campaign=nov", "--reason", "wrong layout").code == 0
    return load_json(cli, path, "--again", campaign="nov")


@pytest.mark.skipif(ON_POSTGRES, reason="the proofs are SQLite's")
def test_a_reload_into_its_own_campaign_is_proved_new_without_the_key_index(cli, location, tmp_path, monkeypatch):
    # the cells hold only the replaced import's retracted runs, which hold no keys for the
    # reload: the quick proof stands, and no key index is made
    made = []
    real = runkey.campaign_key
    monkeypatch.setattr(runkey, "campaign_key", lambda conn, cid, create: (made.append(create), real(conn, cid, create)))
    rep = _reloaded(cli, tmp_path)
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["replaces"]) == (2, 0, 1)
    assert made == []
    assert query(location, "SELECT import_id, seed FROM runs WHERE retraction_id IS NULL ORDER BY id") == [(2, 1), (2, 2)]


def test_later_loads_into_a_campaign_with_a_reload_still_hold_each_key_once(cli, location, tmp_path):
    # each key of nov is held twice now (import 1 retracted, import 2 live): the exact way's key
    # index takes the live runs only, and both kinds of holder still keep a file's runs out
    _reloaded(cli, tmp_path)
    path = write(tmp_path / "b.csv", H + "s,1,g1,a,2,ok,99\ns,1,g1,a,3,ok,30\n")
    rep = load_json(cli, path, campaign="nov")
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (1, 1)
    assert rep["warnings"] == [f"{path} line 2: this run (s@1, instance a, seed 2, replicate 0) is already in this "
                               "campaign (import 2); skipped, the stored values are kept"]
    assert query(location, "SELECT import_id, seed, v1 FROM runs WHERE retraction_id IS NULL ORDER BY id") == \
        [(2, 1, 10.0), (2, 2, 20.0), (3, 3, 30.0)]
    assert "blockyard_load_key" not in indexes(location)


@pytest.mark.skipif(ON_POSTGRES, reason="SQLite's exact way keeps the retracted keys itself")
def test_retracted_keys_are_told_apart_when_their_hashes_meet(cli, location, tmp_path, monkeypatch):
    load_json(cli, write(tmp_path / "a.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in (1, 2, 3))))
    assert cli("retract", "--slice", "seed=2,3", "--reason", "bad").code == 0
    monkeypatch.setattr(runkey.RunHashes, "_mix", staticmethod(lambda z: z * 0))  # every key hashed alike
    rep = load_json(cli, write(tmp_path / "b.csv", H + "".join(f"s,1,g1,a,{k},ok,{10 * k}\n" for k in (2, 3, 4, 5))))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (2, 2)
    assert query(location, "SELECT seed, v1 FROM runs WHERE retraction_id IS NULL ORDER BY seed") == \
        [(1, 1.0), (4, 40.0), (5, 50.0)]
