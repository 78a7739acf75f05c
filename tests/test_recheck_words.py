"""recheck explains a change in words, and reads the runs themselves: an edit made to the runs
outside Blockyard reads as changed data, naming the observations it moved."""
from __future__ import annotations

import random

from sqlalchemy import text

from test_ledger import blocktest, campaign, load, runs_of  # noqa: F401  (campaign is a fixture)


def recheck(cli, aid):
    r = cli("recheck", str(aid), "--json")
    assert r.code == 0, r
    return r.json()


def test_an_edit_to_a_run_made_outside_reads_as_changed_data_and_names_the_observation(campaign, cli, wh):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    with wh.engine.begin() as conn:  # a person with a database client, not Blockyard
        first = conn.execute(text("SELECT min(id) FROM runs")).scalar()
        conn.execute(text("UPDATE runs SET v1 = v1 + 50 WHERE id = :id"), {"id": first})
    doc = recheck(cli, aid)
    assert doc["status"] in ("data-changed", "conclusion-changed")
    assert any(" on f1/g1: " in m and " then, " in m for m in doc["explained"]), doc["explained"]
    out = cli("recheck", str(aid)).out
    assert "moved     stk@1.0 on f1/g1:" in out


def test_arrivals_and_retractions_are_named(campaign, cli, tmp_path):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    load(cli, tmp_path, "more.csv", runs_of("1.0", "f1", 0.0, random.Random(3), seeds=(7,)), campaign="c1")
    assert cli("retract", "--slice", "family=f1 seed=1", "--reason", "seed 1 ran on a busy host").code == 0
    doc = recheck(cli, aid)
    said = "\n".join(doc["explained"])
    assert "import 2 (more.csv) brought 12 runs into the slice" in said
    assert "retraction 1 (seed 1 ran on a busy host) took 24 runs of its slice out" in said


def test_an_unchanged_analysis_explains_nothing(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    doc = recheck(cli, aid)
    assert doc["status"] == "unchanged" and doc["explained"] == []
