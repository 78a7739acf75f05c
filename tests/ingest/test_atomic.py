"""One file, one transaction: a failure anywhere leaves no trace; big loads keep every check."""
from __future__ import annotations

import pytest

from conftest import ON_POSTGRES
from warehouse.ingest import load, sources
from warehouse.store import bulk

from .kit import everything, load_json, query, refusal, write

H = "solver,version,family,group,instance,seed,status,finished_at,host,pallets\n"


def big_csv(path, n: int, bad_line: int | None = None, dup_of: int | None = None):
    """n made-up runs (line k+2 holds run k); optionally a bad value on one line, or a repeat of a run."""
    lines = []
    for k in range(n):
        line = k + 2
        seed = k // 400
        inst = k % 400
        pallets = "oops" if line == bad_line else str(20 + k % 7)
        if dup_of is not None and line == n + 1:  # the last line repeats the run on line dup_of
            seed, inst = (dup_of - 2) // 400, (dup_of - 2) % 400
        lines.append(f"stacker,1.6,fam{inst % 4},g{inst % 20},i{inst},{seed},ok,2026-11-09T10:00:00Z,rack-a,{pallets}\n")
    path.write_text(H + "".join(lines), encoding="utf-8")
    return path


def indexes(location):
    if ON_POSTGRES:
        return sorted(r[0] for r in query(location, "SELECT indexname FROM pg_indexes WHERE tablename = 'runs' AND schemaname = current_schema()"))
    return sorted(r[0] for r in query(location, "SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = 'runs'"))


def test_bad_row_past_the_first_chunk_leaves_no_trace(cli, location, tmp_path):
    n, bad = 200_000, 150_000
    assert sources.CHUNK_ROWS < bad - 1  # the bad line is in a later chunk than the first
    load_json(cli, write(tmp_path / "seed.csv", H + "other,1,f,g,x,1,ok,,rack-z,1\n"), campaign="base")
    before, kept = everything(location), indexes(location)
    path = big_csv(tmp_path / "big.csv", n, bad_line=bad)
    line = refusal(cli, path, campaign="nov")
    assert line.startswith(f"blockyard: {path} line {bad}, field pallets: 'oops' is not a number"), line
    assert everything(location) == before  # runs, imports, solvers, instances, groups, hosts, campaigns
    assert indexes(location) == kept
    assert query(location, "SELECT count(*) FROM campaigns WHERE name = 'nov'") == [(0,)]


def test_large_load_with_a_repeated_run_names_both_lines(cli, location, tmp_path):
    # large enough for the SQLite fast path (indexes rebuilt at the end); the repeat is caught there
    # and the load starts over to name the lines
    n = bulk.BULK_MIN_ROWS + 2_000
    path = big_csv(tmp_path / "big.csv", n, dup_of=7)
    before, kept = everything(location), indexes(location)
    line = refusal(cli, path)
    assert f"{path}: lines 7 and {n + 1} hold the same run (stacker@1.6, instance i5, seed 0, replicate 0)" in line
    assert everything(location) == before
    assert indexes(location) == kept


def test_large_load_stores_everything_and_keeps_the_indexes(cli, location, tmp_path):
    n = bulk.BULK_MIN_ROWS + 2_000
    kept = indexes(location)
    rep = load_json(cli, big_csv(tmp_path / "big.csv", n))
    assert rep["rows_loaded"] == n
    assert indexes(location) == kept
    assert query(location, "SELECT count(*), count(DISTINCT instance_id), min(source_line), max(source_line) FROM runs") == \
        [(n, 400, 2, n + 1)]
    if not ON_POSTGRES:
        assert query(location, "PRAGMA foreign_key_check") == []
        assert query(location, "PRAGMA integrity_check") == [("ok",)]


@pytest.mark.parametrize("huge_seed", [False, True], ids=["float-table", "seed-past-2-53"])
def test_large_first_load_numbers_runs_in_file_order_with_every_field_in_place(cli, location, tmp_path, huge_seed):
    # A large first load lets the database number the runs (no id bound): run k of the file must
    # still get id k+1, the import's id range must be those ids, and no field may slide into its
    # neighbour's column. Checked on both ways of writing (one float table; Python ints when a
    # seed is past 2**53, which a float cannot hold).
    n = bulk.BULK_MIN_ROWS + 2_000
    path = big_csv(tmp_path / "big.csv", n)
    text = path.read_text(encoding="utf-8").splitlines(keepends=True)
    # line 5 (run id 4) has neither a finish time nor a host; line 7 (id 6) a seed only Python ints hold exactly
    text[4] = "stacker,1.6,fam3,g3,i3,0,ok,,,23\n"
    if huge_seed:
        text[6] = "stacker,1.6,fam1,g5,i5,9007199254740993,ok,2026-11-09T10:00:00Z,rack-a,25\n"
    path.write_text("".join(text), encoding="utf-8")
    assert load_json(cli, path)["rows_loaded"] == n
    assert query(location, "SELECT count(*) FROM runs WHERE id <> source_line - 1") == [(0,)]
    assert query(location, "SELECT first_run_id, last_run_id FROM imports") == [(1, n)]
    assert query(location, "SELECT seed, finished_at, host_id, v1 FROM runs WHERE id IN (4, 5, 6) ORDER BY id") == [
        (0, None, None, 23.0),
        (0, 1794218400, 1, 24.0),  # 2026-11-09T10:00:00Z: 1794218400 s after the epoch (GNU date -u -d ... +%s)
        (9007199254740993 if huge_seed else 0, 1794218400, 1, 25.0),
    ]


def test_large_load_over_stored_runs_skips_them(cli, location, tmp_path):
    n = bulk.BULK_MIN_ROWS + 2_000
    first = big_csv(tmp_path / "a.csv", 3_000)
    load_json(cli, first)
    rep = load_json(cli, big_csv(tmp_path / "b.csv", n))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (n - 3_000, 3_000)
    assert everything(location)["runs"] == n


@pytest.mark.skipif(ON_POSTGRES, reason="SQLite's own storage classes")
def test_sqlite_stores_integers_as_integers_and_missing_values_as_null(cli, location, tmp_path):
    # SQLite datatypes (section 2, storage classes): whole numbers are INTEGER, metrics REAL, gaps NULL
    path = write(tmp_path / "t.csv", H + "s,1,f,g,a,1,ok,2026-11-09T10:00:00Z,rack-a,3.5\ns,1,f,g,a,2,timeout,,,\n")
    load_json(cli, path)
    got = query(location, "SELECT typeof(id), typeof(seed), typeof(status), typeof(finished_at), typeof(host_id), "
                          "typeof(source_line), typeof(v1) FROM runs ORDER BY seed")
    assert got == [("integer", "integer", "integer", "integer", "integer", "integer", "real"),
                   ("integer", "integer", "integer", "null", "null", "integer", "null")]
    cells = query(location, "SELECT typeof(solver_id), typeof(host_id), typeof(n), typeof(n_ok), typeof(sum_ok), "
                            "typeof(id_sum) FROM cell_stats ORDER BY host_id")
    assert cells == [("integer", "null", "integer", "integer", "null", "integer"),
                     ("integer", "integer", "integer", "integer", "real", "integer")]


@pytest.mark.skipif(ON_POSTGRES, reason="a SQLite connection setting")
def test_foreign_keys_are_back_on_after_a_load(wh, tmp_path):
    path = write(tmp_path / "t.csv", H + "s,1,f,g,a,1,ok,,,3\n")
    load.load_file(wh, path, "c")
    with pytest.raises(Exception):
        load.load_file(wh, write(tmp_path / "bad.csv", H + "s,1,f,g,a,1,ok,,,x\n"), "c")
    with wh.engine.connect() as c:
        assert c.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1


def test_huge_seeds_are_kept_exactly(cli, location, tmp_path):
    # PostgreSQL documentation, numeric types: bigint runs from -9223372036854775808 to
    # +9223372036854775807 (SQLite's INTEGER is the same 8-byte signed range)
    path = write(tmp_path / "t.csv", H + "s,1,f,g,a,9223372036854775807,ok,,,3\ns,1,f,g,a,-9007199254740993,ok,,,3\n")
    load_json(cli, path)
    assert sorted(r[0] for r in query(location, "SELECT seed FROM runs")) == [-9007199254740993, 9223372036854775807]


def test_seed_past_64_bits_is_refused(cli, location, tmp_path):
    path = write(tmp_path / "t.csv", H + "s,1,f,g,a,9223372036854775808,ok,,,3\n")
    assert "line 2, field seed: '9223372036854775808' is out of range" in refusal(cli, path)
