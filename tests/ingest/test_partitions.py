"""PostgreSQL: runs partitioned by campaign (revision 0010) and the loads' binary COPY.

A load of a new campaign fills a table of its own with no index and attaches it at the end;
a load into a campaign with runs goes through its partition's run key. What a user sees must be
the same either way, and the same as on SQLite: the runs stored exactly, repeated runs named,
stored ones skipped, a failed load leaving nothing (not even its table). The binary format is
checked against the server itself: PostgreSQL reads the bytes back into the values we meant
(PostgreSQL documentation, COPY, Binary Format).
"""
from __future__ import annotations

import numpy as np
import pytest

from conftest import ON_POSTGRES
from warehouse.errors import InputError
from warehouse.store.pgcopy import binary_rows, framed

from .kit import csv_text, load_json, query, refusal, runs, write

pytestmark = pytest.mark.skipif(not ON_POSTGRES, reason="PostgreSQL's partitions and COPY format")

H = "solver,version,group,instance,seed,status,pallets\n"


def partitions(location: str) -> list[str]:
    return [r[0] for r in query(location, "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid "
                                          "WHERE i.inhparent = 'runs'::regclass ORDER BY 1")]


def cell_partitions(location: str) -> list[str]:
    return [r[0] for r in query(location, "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid "
                                          "WHERE i.inhparent = 'cell_stats'::regclass ORDER BY 1")]


def loose_tables(location: str) -> list[str]:
    """Tables named like a campaign's partition of runs or cell_stats that are not attached (a
    load's leftovers)."""
    return [r[0] for r in query(location, "SELECT relname FROM pg_class WHERE relkind = 'r' AND (relname LIKE 'runs_c%' "
                                          "OR relname LIKE 'cells_c%') AND NOT relispartition "
                                          "AND relnamespace = current_schema()::regnamespace")]


def attached_indexes(location: str, table: str) -> list[tuple[str, str]]:
    """(the partition's index, the parent's index it is attached to)."""
    return sorted(query(location, "SELECT c.relname, p.relname FROM pg_index x JOIN pg_class c ON c.oid = x.indexrelid "
                                  "LEFT JOIN pg_inherits i ON i.inhrelid = c.oid LEFT JOIN pg_class p ON p.oid = i.inhparent "
                                  "WHERE x.indrelid = CAST(:t AS regclass)", t=table))


def indexes(location: str, table: str) -> list[str]:
    return sorted(r[0] for r in query(location, "SELECT indexdef FROM pg_indexes WHERE tablename = :t "
                                                "AND schemaname = current_schema()", t=table))


def test_each_campaign_gets_its_own_partition_and_no_run_key_until_a_load_needs_one(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", csv_text(runs(30))), campaign="night-1")
    load_json(cli, write(tmp_path / "b.csv", csv_text(runs(20, start_seed=40))), campaign="night-2")
    ids = dict(query(location, "SELECT name, id FROM campaigns"))
    assert partitions(location) == sorted([f"runs_c{ids['night-1']}", f"runs_c{ids['night-2']}"])
    assert loose_tables(location) == []
    # a new campaign's load proved its runs new from the file's key hashes: the attach builds no
    # run key (revision 0013), only the block-range index on id; and the retracted runs' index
    # the table was made with (revision 0012) is taken by the attach as the partition's own,
    # not built a second time beside it
    names = indexes(location, f"runs_c{ids['night-1']}")
    assert not any("UNIQUE" in d for d in names), names
    assert sum("WHERE (retraction_id IS NOT NULL)" in d for d in names) == 1, names
    assert sum("USING brin" in d for d in names) == 1 and len(names) == 2, names
    assert query(location, "SELECT campaign_id, count(*) FROM runs GROUP BY 1 ORDER BY 1") == \
        [(ids["night-1"], 30), (ids["night-2"], 20)]
    # the parent holds no key either: each campaign's partition keeps its own
    assert not any("UNIQUE" in d for d in indexes(location, "runs"))


def test_a_new_campaigns_cell_summaries_fill_a_table_of_their_own_indexed_once_full(cli, location, tmp_path):
    """Revision 0014: cell_stats is partitioned by campaign; a new campaign's cell rows go into a
    table with no index, whose three indexes are built once it is full and attached to the
    parent's; a second file into the campaign writes through the parent into the same partition."""
    load_json(cli, write(tmp_path / "a.csv", csv_text(runs(30))), campaign="night-1")
    load_json(cli, write(tmp_path / "b.csv", csv_text(runs(20, start_seed=40))), campaign="night-2")
    ids = dict(query(location, "SELECT name, id FROM campaigns"))
    one, two = f"cells_c{ids['night-1']}", f"cells_c{ids['night-2']}"
    assert cell_partitions(location) == sorted([one, two])
    assert loose_tables(location) == []
    assert query(location, "SELECT relkind FROM pg_class WHERE oid = 'cell_stats'::regclass") == [("p",)]
    assert attached_indexes(location, one) == [(f"{one}_campaign", "ix_cells_campaign"),
                                               (f"{one}_import", "ix_cells_import"),
                                               (f"{one}_solver", "ix_cells_solver")]
    by_campaign = query(location, "SELECT campaign_id, sum(n) FROM cell_stats WHERE slot = 1 GROUP BY 1 ORDER BY 1")
    assert by_campaign == [(ids["night-1"], 30), (ids["night-2"], 20)]
    assert query(location, f"SELECT DISTINCT campaign_id FROM {one}") == [(ids["night-1"],)]
    # the next file into night-1: through the parent, into the same partition (no new table)
    rep = load_json(cli, write(tmp_path / "c.csv", csv_text(runs(10, start_seed=90))), campaign="night-1")
    assert rep["rows_loaded"] == 10
    assert cell_partitions(location) == sorted([one, two]) and loose_tables(location) == []
    assert query(location, f"SELECT count(DISTINCT import_id), sum(n) FROM {one} WHERE slot = 1") == [(2, 40)]
    # and the stored summaries still agree with the runs
    assert cli("verify").code == 0


def test_a_second_file_into_a_campaign_makes_its_run_key_and_goes_through_it(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(1, 7))))
    (part,) = partitions(location)
    assert not any("UNIQUE" in d for d in indexes(location, part))
    rep = load_json(cli, write(tmp_path / "b.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(4, 10))))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (3, 3)
    assert query(location, "SELECT seed, v1 FROM runs ORDER BY id") == [(k, float(k)) for k in range(1, 10)]
    assert partitions(location) == [part]
    keys = [d for d in indexes(location, part) if "UNIQUE" in d]
    assert len(keys) == 1 and "(solver_id, instance_id, seed, replicate) WHERE (retraction_id IS NULL)" in keys[0], keys
    # kept: a third file meets the same key (made once), and its taken runs are skipped again
    rep = load_json(cli, write(tmp_path / "c.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(8, 12))))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (2, 2)
    assert [d for d in indexes(location, part) if "UNIQUE" in d] == keys


def test_a_campaign_key_made_while_another_campaign_loads_waits_for_nothing(cli, location, tmp_path):
    """Making a partition's key locks that partition alone: a load of another campaign, holding
    its transaction open, does not hold it up (the loads' lock on runs is the parent's alone)."""
    import threading

    from warehouse.store.connect import open_warehouse

    load_json(cli, write(tmp_path / "a.csv", csv_text(runs(10))), campaign="mine")
    load_json(cli, write(tmp_path / "o.csv", csv_text(runs(10, start_seed=100))), campaign="other")
    wh = open_warehouse(location)
    other = dict(query(location, "SELECT name, id FROM campaigns"))["other"]
    started, done = threading.Event(), threading.Event()

    def hold():  # another campaign's load, stopped half-way: its rows written, not committed
        from warehouse.store.connect import hold_runs_for_load

        with wh.engine.connect() as conn, conn.begin():
            hold_runs_for_load(conn, "other")
            conn.exec_driver_sql(f"UPDATE runs SET status = status WHERE campaign_id = {int(other)}")
            started.set()
            done.wait(30)

    t = threading.Thread(target=hold)
    t.start()
    try:
        assert started.wait(30)
        rep = load_json(cli, write(tmp_path / "b.csv", csv_text(runs(15))), campaign="mine")
        assert rep["rows_loaded"] == 5 and rep["rows_skipped"] == 10, rep
        # done while the other load still held its transaction (had it waited, it would have
        # finished only once the holder gave up, 30 s on)
        assert t.is_alive() and not done.is_set()
        mine = dict(query(location, "SELECT name, id FROM campaigns"))["mine"]
        assert any("UNIQUE" in d for d in indexes(location, f"runs_c{mine}"))
    finally:
        done.set()
        t.join()
        wh.close()


def test_a_refused_new_campaign_leaves_no_table(cli, location, tmp_path):
    rs = runs(12)
    line = refusal(cli, write(tmp_path / "twice.csv", csv_text(rs + [rs[3]])), campaign="fresh")
    assert "lines 5 and 14 hold the same run" in line, line
    assert partitions(location) == [] and cell_partitions(location) == [] and loose_tables(location) == []
    assert query(location, "SELECT count(*) FROM campaigns") == [(0,)]


def test_a_dry_run_of_a_new_campaign_leaves_no_table(cli, location, tmp_path):
    f = write(tmp_path / "a.csv", csv_text(runs(10)))
    assert cli("load", str(f), "--campaign", "dry", "--dry-run").code == 0
    assert partitions(location) == [] and cell_partitions(location) == [] and loose_tables(location) == []


def test_the_binary_format_reads_back_as_the_values_meant(location):
    """Whole numbers of each width, NULLs in several patterns, and doubles that text would round."""
    ints8 = np.array([1, -2, 2**62, 0, 7], dtype=np.int64)
    ints4 = np.array([5, -(2**31), 2**31 - 1, 0, 3], dtype=np.int64)
    ints2 = np.array([1, -1, 32767, 0, 2], dtype=np.int64)
    floats = np.array([0.1, 1 / 3, -1e308, np.nan, 2.5e-300])
    host = np.array([4, 0, 9, 1, 2], dtype=np.int64)
    cols = [(ints8, None), (ints4, None), (ints2, None), (floats, np.isnan(floats)),
            (host, np.array([False, True, False, True, False]))]
    payload = framed(binary_rows(cols, [">i8", ">i4", ">i2", ">f8", ">i4"]))
    from warehouse.store.connect import open_warehouse

    wh = open_warehouse(location)
    try:
        with wh.engine.begin() as conn:
            conn.exec_driver_sql("CREATE TEMP TABLE b (a bigint, b integer, c smallint, d double precision, e integer)")
            cur = conn.connection.driver_connection.cursor()
            with cur.copy("COPY b FROM STDIN (FORMAT binary)") as cp:
                cp.write(payload)
            got = sorted(conn.exec_driver_sql("SELECT a, b, c, d, e FROM b").all())
    finally:
        wh.close()
    want = sorted((int(a), int(b), int(c), None if np.isnan(d) else float(d), None if n else int(e))
                  for a, b, c, d, e, n in zip(ints8, ints4, ints2, floats, host, cols[4][1]))
    assert got == want  # (exact: 1/3 and 2.5e-300 come back bit for bit)


def test_a_whole_number_too_wide_for_its_column_is_refused_before_the_server():
    with pytest.raises(InputError, match="does not fit the warehouse's 32-bit column"):
        binary_rows([(np.array([2**31]), None)], [">i4"])


def test_a_large_first_load_leaves_the_summaries_analyzed(cli, location, tmp_path):
    # the planner's statistics of the columns the slices filter and join on, made after the load
    # (store/cells.refresh_statistics; PostgreSQL documentation, "Populating a Database": run
    # ANALYZE after loading much data); the sums are left to autovacuum
    # (revision 0014: the campaign's partition of cell_stats, the table a slice of it reads)
    load_json(cli, write(tmp_path / "a.csv", csv_text(runs(40))), campaign="night-1")
    (part,) = cell_partitions(location)
    seen = {(t, c) for t, c in query(location, "SELECT tablename, attname FROM pg_stats WHERE schemaname = "
                                               "current_schema() AND tablename IN (:p, 'block_stats')", p=part)}
    assert {(part, "campaign_id"), (part, "instance_id"), (part, "slot"),
            ("block_stats", "group_id"), ("block_stats", "solver_id")} <= seen
    assert (part, "sum_ok") not in seen
    assert query(location, "SELECT reltuples > 0 FROM pg_class WHERE oid = CAST(:p AS regclass)", p=part) == [(True,)]


def test_revision_0013_down_and_up_keeps_every_run_and_the_next_load_finds_the_stored_ones(cli, location, tmp_path):
    """Down to 0012 the parent's run key is built again over every partition; back up, it goes,
    and the campaign's next load makes the partition's own key and skips the runs stored."""
    from alembic import command

    from warehouse.store.connect import _alembic_config, open_warehouse

    load_json(cli, write(tmp_path / "a.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(1, 7))))
    load_json(cli, write(tmp_path / "b.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(4, 10))))
    (part,) = partitions(location)
    assert any("UNIQUE" in d for d in indexes(location, part))  # made by the second load
    wh = open_warehouse(location)
    try:
        with wh.engine.connect() as conn, conn.begin():
            command.downgrade(_alembic_config(conn), "0012")
            # (read here: a warehouse at 0012 does not open for this Blockyard)
            def defs(t):
                return [r[0] for r in conn.exec_driver_sql(
                    "SELECT indexdef FROM pg_indexes WHERE tablename = %s AND schemaname = current_schema()", (t,))]
            assert any(d.startswith("CREATE UNIQUE INDEX ux_runs_key") for d in defs("runs"))
            keys = [d for d in defs(part) if "UNIQUE" in d]
            assert len(keys) == 1 and "campaign_id, solver_id" in keys[0], keys  # the parent's, not the campaign's own
            assert conn.exec_driver_sql("SELECT to_regproc('blockyard_key_partition')").scalar() is None
    finally:
        wh.close()
    assert cli("upgrade").code == 0
    assert not any("UNIQUE" in d for d in indexes(location, "runs") + indexes(location, part))
    rep = load_json(cli, write(tmp_path / "c.csv", H + "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(8, 12))))
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (2, 2)
    assert query(location, "SELECT seed FROM runs ORDER BY id") == [(k,) for k in range(1, 12)]
    assert [d for d in indexes(location, part) if "UNIQUE" in d] != []


def test_revision_0014_down_and_up_keeps_every_cell_row_and_the_loads_go_on(cli, location, tmp_path):
    """Down to 0013 cell_stats is one table again with its three indexes; back up, each campaign
    has its partition again holding the same rows, and the next loads of an old and a new
    campaign are stored and agree with their runs."""
    from alembic import command

    from warehouse.store.connect import _alembic_config, open_warehouse

    load_json(cli, write(tmp_path / "a.csv", csv_text(runs(30))), campaign="night-1")
    load_json(cli, write(tmp_path / "b.csv", csv_text(runs(20, start_seed=40))), campaign="night-2")
    everything = "SELECT * FROM cell_stats ORDER BY import_id, slot, solver_id, instance_id, host_id"
    before = query(location, everything)
    wh = open_warehouse(location)
    try:
        with wh.engine.connect() as conn, conn.begin():
            command.downgrade(_alembic_config(conn), "0013")
            # (read here: a warehouse at 0013 does not open for this Blockyard)
            assert conn.exec_driver_sql("SELECT relkind FROM pg_class WHERE oid = 'cell_stats'::regclass").scalar() == "r"
            assert [tuple(r) for r in conn.exec_driver_sql(everything)] == before
            names = sorted(r[0] for r in conn.exec_driver_sql(
                "SELECT indexname FROM pg_indexes WHERE tablename = 'cell_stats' AND schemaname = current_schema()"))
            assert names == ["ix_cells_campaign", "ix_cells_import", "ix_cells_solver"]
            assert conn.exec_driver_sql("SELECT to_regclass('cells_c1')").scalar() is None
            assert conn.exec_driver_sql("SELECT to_regproc('blockyard_open_cells')").scalar() is None
    finally:
        wh.close()
    assert cli("upgrade").code == 0
    ids = dict(query(location, "SELECT name, id FROM campaigns"))
    assert cell_partitions(location) == sorted(f"cells_c{i}" for i in ids.values())
    assert query(location, everything) == before
    # each partition analyzed by the upgrade (the old table's statistics went with it)
    analyzed = query(location, "SELECT DISTINCT tablename FROM pg_stats WHERE schemaname = current_schema() "
                               "AND tablename LIKE 'cells_c%' AND attname = 'instance_id' ORDER BY 1")
    assert [r[0] for r in analyzed] == cell_partitions(location)
    load_json(cli, write(tmp_path / "c.csv", csv_text(runs(10, start_seed=90))), campaign="night-1")
    load_json(cli, write(tmp_path / "d.csv", csv_text(runs(10))), campaign="night-3")
    assert len(cell_partitions(location)) == 3 and loose_tables(location) == []
    assert query(location, "SELECT sum(n) FROM cell_stats WHERE slot = 1") == [(70,)]
    assert cli("verify").code == 0
