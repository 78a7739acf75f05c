"""`blockyard verify`: edits made to a warehouse outside Blockyard are found, said, and the
summaries can be made again from the runs.

Each edit is made with plain SQL on the test's own database (SQLite through sqlite3-level SQL
via SQLAlchemy's raw connection, PostgreSQL the same way), as a person with a database client
would make it. The exit status contract (0 all holds, 3 something does not) is ours.
"""
from __future__ import annotations

import random

import pytest
from sqlalchemy import text

from conftest import ON_POSTGRES
from test_ledger import load, runs_of


@pytest.fixture
def two_campaigns(cli, tmp_path):
    rng = random.Random(5)
    load(cli, tmp_path, "a.csv", runs_of("1.0", "f1", 0.0, rng) + runs_of("2.0", "f1", -2.0, rng), campaign="c1")
    load(cli, tmp_path, "b.csv", runs_of("3.0", "f1", -1.0, rng), campaign="c2")
    assert cli("blocktest", "--metric", "pallets").code == 0
    return rng


def sql(wh, statement: str, **params) -> None:
    with wh.engine.begin() as conn:
        conn.execute(text(statement), params)


def verify(cli, *extra):
    r = cli("verify", "--json", *extra)
    assert r.code in (0, 3), r
    return r.code, {c["check"]: c for c in r.json()["checks"]}, r.json()


def test_a_fresh_warehouse_holds(two_campaigns, cli):
    code, checks, doc = verify(cli)
    assert code == 0 and doc["ok"] is True
    assert all(c["ok"] for c in checks.values())
    assert set(checks) == {"integrity", "imports", "cells", "blocks", "ledger"}
    text_out = cli("verify").out
    assert "all holds" in text_out


EDITS = {
    # what a person might do with a database client, and which check must see it
    "value changed": ("UPDATE runs SET v1 = v1 + 1 WHERE id = (SELECT min(id) FROM runs)", {"cells"}),
    "run deleted": ("DELETE FROM runs WHERE id = (SELECT max(id) FROM runs WHERE campaign_id = 1)", {"cells", "imports"}),
    "status changed": ("UPDATE runs SET status = 2 WHERE id = (SELECT min(id) FROM runs)", {"cells"}),
    "moved to another instance": (  # (with a seed of its own: PostgreSQL's run key stays unique)
        "UPDATE runs SET instance_id = (SELECT max(id) FROM instances), seed = 777 WHERE id = (SELECT min(id) FROM runs)",
        {"cells"}),
    "run inserted": (
        "INSERT INTO runs (id, campaign_id, import_id, solver_id, instance_id, seed, replicate, status, source_line, v1) "
        "SELECT max(id) + 1000, 1, 1, 1, 1, 99, 0, 0, 999, 42.0 FROM runs", {"cells", "imports"}),
    "a whole campaign's runs deleted": ("DELETE FROM runs WHERE campaign_id = 2", {"cells", "imports"}),
    "analysis edited": ("UPDATE analyses SET result = replace(result, '\"f\"', '\"F\"')", {"ledger"}),
    "block summary edited": ("UPDATE block_stats SET n = n + 1 WHERE slot = 1", {"blocks"}),
}


@pytest.mark.parametrize("edit", sorted(EDITS))
def test_each_edit_made_outside_is_found_and_named(two_campaigns, cli, wh, edit):
    statement, seen_by = EDITS[edit]
    sql(wh, statement)
    code, checks, doc = verify(cli)
    assert code == 3 and doc["ok"] is False
    wrong = {name for name, c in checks.items() if not c["ok"]}
    assert seen_by <= wrong, (edit, wrong)
    for name in wrong:
        assert checks[name]["found"], name  # each finding is worded, not only counted
    r = cli("verify")
    assert r.code == 3 and "does not hold together" in r.err


@pytest.mark.parametrize("edit", ["value changed", "status changed", "moved to another instance",
                                  "block summary edited"])
def test_repair_makes_the_summaries_again_and_an_analysis_then_sees_the_runs(two_campaigns, cli, wh, edit):
    before = cli("blocktest", "--metric", "pallets", "--json").json()
    sql(wh, EDITS[edit][0])
    stale = cli("blocktest", "--metric", "pallets", "--json").json()
    code, _, doc = verify(cli, "--repair")
    assert doc["repaired_imports"] == 2
    assert all(c["ok"] for c in doc["after_repair"])
    assert code == 0  # the summaries were all that was wrong
    after = cli("blocktest", "--metric", "pallets", "--json").json()
    if edit == "block summary edited":
        assert after["anova"] == before["anova"]
    else:
        # the edited runs now reach the analysis (before the repair it read the old summaries)
        assert after["treatment_means"] != stale["treatment_means"] or after["anova"] != stale["anova"]
    assert verify(cli)[0] == 0


def test_repair_never_touches_the_runs_or_the_ledger(two_campaigns, cli, wh):
    sql(wh, EDITS["run deleted"][0])
    with wh.engine.connect() as conn:
        runs = conn.execute(text("SELECT count(*) FROM runs")).scalar()
        ledger = conn.execute(text("SELECT id, result_digest FROM analyses ORDER BY id")).all()
    code, checks, doc = verify(cli, "--repair")
    assert code == 3  # the import still counts a run that is gone: said, not hidden
    assert [c["check"] for c in doc["after_repair"]] == ["cells", "blocks"]
    with wh.engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM runs")).scalar() == runs
        assert conn.execute(text("SELECT id, result_digest FROM analyses ORDER BY id")).all() == ledger
    assert "imports" in {n for n, c in verify(cli)[1].items() if not c["ok"]}


@pytest.mark.skipif(ON_POSTGRES, reason="a damaged file is a SQLite matter (PostgreSQL checks its own pages)")
def test_a_damaged_file_is_reported(two_campaigns, cli, location):
    import os
    import sqlite3

    con = sqlite3.connect(location)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")  # every page in the main file
    page = con.execute("PRAGMA page_size").fetchone()[0]
    con.close()
    size = os.path.getsize(location)
    rng = random.Random(3)
    with open(location, "r+b") as fh:  # scribble over every page but the first (the schema)
        fh.seek(page)
        fh.write(bytes(rng.getrandbits(8) for _ in range(size - page)))
    r = cli("verify")
    # a damaged page is found by the integrity check (exit 3) or stops the reading at once (exit 2,
    # one line); either way it is said, never a success
    assert r.code in (2, 3), r
    assert r.code == 2 or "integrity" in r.out and "holds          the database file" not in r.out
    assert len(r.err.strip().splitlines()) <= 1


@pytest.mark.skipif(ON_POSTGRES, reason="a damaged file is a SQLite matter (PostgreSQL checks its own pages)")
def test_a_load_refuses_a_damaged_file_and_names_verify(two_campaigns, cli, location, tmp_path):
    import os
    import sqlite3

    con = sqlite3.connect(location)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    page = con.execute("PRAGMA page_size").fetchone()[0]
    # the page of the runs table's root, overwritten: its b-tree no longer holds together
    root = con.execute("SELECT rootpage FROM sqlite_master WHERE name = 'runs'").fetchone()[0]
    con.close()
    with open(location, "r+b") as fh:
        fh.seek((root - 1) * page)
        fh.write(os.urandom(page))
    more = tmp_path / "more.csv"
    more.write_text("solver,version,family,group,instance,seed,pallets\nstk,9,f1,g1,i1,1,3\n")
    r = cli("load", str(more), "--campaign", "c3")
    assert r.code == 2, r
    assert "fails SQLite's quick check" in r.err and "blockyard verify" in r.err
    assert len(r.err.strip().splitlines()) == 1


@pytest.mark.skipif(not ON_POSTGRES, reason="SQLite's foreign keys refuse such a run (revision 0009)")
def test_a_run_naming_a_solver_that_is_not_there_is_found(two_campaigns, cli, wh):
    # PostgreSQL holds no reference constraint on the ids a load writes: verify checks them instead
    sql(wh, "UPDATE runs SET solver_id = 999999 WHERE id = (SELECT min(id) FROM runs)")
    code, checks, _ = verify(cli)
    assert code == 3
    assert any("1 runs name a solver id that is not in the warehouse" in f for f in checks["imports"]["found"])


@pytest.mark.skipif(not ON_POSTGRES, reason="SQLite's foreign keys refuse such a row (revision 0012)")
def test_a_block_summary_naming_a_group_that_is_not_there_is_found(two_campaigns, cli, wh):
    # nor on the block summaries' ids (revision 0012): verify names the stray row, and the blocks
    # check finds a summary no cell makes
    sql(wh, "UPDATE block_stats SET group_id = 999999 WHERE (import_id, slot, solver_id, group_id) = "
            "(SELECT import_id, slot, solver_id, group_id FROM block_stats ORDER BY 1, 2, 3, 4 LIMIT 1)")
    code, checks, _ = verify(cli)
    assert code == 3
    assert any("1 block summaries name a group id that is not in the warehouse" in f
               for f in checks["imports"]["found"])
    assert any("not made from any cell" in f for f in checks["blocks"]["found"])


def test_a_run_put_in_twice_by_hand_is_found(two_campaigns, cli, wh):
    # No index holds the whole runs table to one live run per key (a load proves its runs new;
    # on PostgreSQL a campaign's partition gets its key when a later load needs one, revision
    # 0013), so a copy of a stored run put in with a database client is named by verify.
    sql(wh, "INSERT INTO runs (id, campaign_id, import_id, solver_id, instance_id, seed, replicate, status, "
            "source_line, v1) SELECT id + 100000, campaign_id, import_id, solver_id, instance_id, seed, replicate, "
            "status, source_line, v1 FROM runs WHERE id = (SELECT min(id) FROM runs WHERE campaign_id = 2)")
    code, checks, _ = verify(cli)
    assert code == 3
    assert any(f.startswith("campaign c2: 1 run key is held by more than one live run") for f in checks["imports"]["found"]), \
        checks["imports"]["found"]
    # a retracted copy holds no key: retracting the whole campaign leaves nothing to name
    assert cli("retract", "--slice", "campaign=c2", "--reason", "a copy put in by hand").code == 0
    _, checks, _ = verify(cli)
    assert not any("held by more than one live run" in f for f in checks["imports"]["found"])


def test_a_load_into_a_campaign_holding_a_run_twice_is_refused_in_one_line(two_campaigns, cli, wh, tmp_path):
    # The campaign's key index cannot be made over two live runs with one key (PostgreSQL: the
    # partition's own, revision 0013; SQLite: the load's exact-way index, revision 0007), so a
    # file into that campaign whose cells meet the stored ones is refused, naming the campaign
    # and the way to find the pair; nothing of it is stored.
    from test_ledger import write_runs

    sql(wh, "INSERT INTO runs (id, campaign_id, import_id, solver_id, instance_id, seed, replicate, status, "
            "source_line, v1) SELECT id + 100000, campaign_id, import_id, solver_id, instance_id, seed, replicate, "
            "status, source_line, v1 FROM runs WHERE id = (SELECT min(id) FROM runs WHERE campaign_id = 2)")
    before = cli("inventory", "--json").out
    more = write_runs(tmp_path / "more.csv", runs_of("3.0", "f1", -1.0, random.Random(9), seeds=(1, 7)))
    r = cli("load", more, "--campaign", "c2")
    assert r.code == 2, r
    lines = r.err.strip().splitlines()
    assert len(lines) == 1, r.err
    assert "campaign c2 already holds two live runs under one key" in lines[0] and "blockyard verify" in lines[0], lines
    assert cli("inventory", "--json").out == before
