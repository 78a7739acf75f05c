"""The ledger: stored analyses, fingerprints, recheck, retraction and its undo, claims and recall."""
from __future__ import annotations

import csv
import json
import os
import random
import re
import subprocess
import sys
import time
from datetime import datetime, timezone

import pytest
from sqlalchemy import text

from warehouse.select.slices import parse_when

HEADER = ["solver", "version", "family", "group", "instance", "seed", "finished_at", "pallets"]
FINISHED = datetime.fromtimestamp(time.time() - 2 * 86400, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def write_runs(path, runs) -> str:
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=HEADER)
        w.writeheader()
        w.writerows(runs)
    return str(path)


def load(cli, tmp_path, name, runs, campaign="c1"):
    r = cli("load", write_runs(tmp_path / name, runs), "--campaign", campaign)
    assert r.code == 0, r
    return r


def runs_of(version, family, shift, rng, seeds=(1, 2), groups=range(1, 7), noise=0.3):
    out = []
    for g in groups:
        for inst in ("i1", "i2"):
            for seed in seeds:
                out.append(dict(solver="stk", version=version, family=family, group=f"g{g}", instance=inst, seed=seed,
                                finished_at=FINISHED, pallets=round(30 + 2 * g + shift + rng.gauss(0, noise), 4)))
    return out


@pytest.fixture
def campaign(cli, tmp_path):
    """Two families; on both, stk@2.0 uses about 2 pallets fewer than stk@1.0."""
    rng = random.Random(17)
    runs = []
    for family in ("f1", "f2"):
        runs += runs_of("1.0", family, 0.0, rng) + runs_of("2.0", family, -2.0, rng)
    load(cli, tmp_path, "runs.csv", runs)
    return rng


def blocktest(cli, slice_text, *extra):
    r = cli("blocktest", "--slice", slice_text, "--metric", "pallets", *extra, "--json")
    assert r.code == 0, r
    return r.json()


def recall_one(cli, analysis_id) -> dict:
    r = cli("recall", str(analysis_id), "--json")
    assert r.code == 0, r
    return r.json()


def raw_run_count(location) -> int:
    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    try:
        with w.engine.connect() as c:
            return c.execute(text("SELECT count(*) FROM runs")).scalar()
    finally:
        w.close()


# --- fingerprints -----------------------------------------------------------------------------

def test_fingerprints_are_stable_across_processes_and_follow_the_data(campaign, cli, location, tmp_path):
    env = dict(os.environ)
    cmd = [sys.executable, "-m", "warehouse", "-w", location, "blocktest", "--slice", "family=f1",
           "--metric", "pallets", "--json"]
    ids = []
    for _ in range(2):
        p = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=tmp_path, timeout=120)
        assert p.returncode == 0, p.stderr
        ids.append(json.loads(p.stdout)["analysis_id"])
    assert ids[0] != ids[1]
    first, second = (recall_one(cli, i) for i in ids)
    assert re.fullmatch(r"[0-9a-f]{64}", first["fingerprint"])
    assert first["fingerprint"] == second["fingerprint"]
    assert first["result"] == second["result"]

    # one more file of runs under the slice: a new fingerprint
    more = runs_of("1.0", "f1", 0.0, random.Random(99), seeds=(3,))
    load(cli, tmp_path, "more.csv", more)
    third = recall_one(cli, blocktest(cli, "family=f1")["analysis_id"])
    assert third["fingerprint"] != first["fingerprint"]
    # runs outside the slice leave it alone
    load(cli, tmp_path, "other.csv", runs_of("1.0", "f2", 0.0, random.Random(98), seeds=(3,)))
    fourth = recall_one(cli, blocktest(cli, "family=f1")["analysis_id"])
    assert fourth["fingerprint"] == third["fingerprint"]


def test_settings_are_part_of_the_fingerprint(campaign, cli):
    a = recall_one(cli, blocktest(cli, "family=f1")["analysis_id"])
    b = recall_one(cli, blocktest(cli, "family=f1", "--replicates", "median")["analysis_id"])
    assert a["fingerprint"] != b["fingerprint"]
    assert b["settings"]["collapse"]["replicates"] == "median"


# --- recheck -----------------------------------------------------------------------------------

def recheck(cli, analysis_id) -> dict:
    r = cli("recheck", str(analysis_id), "--json")
    assert r.code == 0, r
    return r.json()


def test_recheck_unchanged_right_after(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    doc = recheck(cli, aid)
    assert doc["status"] == "unchanged"
    assert doc["stored_fingerprint"] == doc["new_fingerprint"]
    assert doc["runs_arrived"] == 0 and doc["runs_withdrawn"] == 0


def test_recheck_data_changed_when_runs_arrive_but_the_conclusion_holds(campaign, cli, tmp_path):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    rng = random.Random(5)
    load(cli, tmp_path, "seed3.csv", runs_of("1.0", "f1", 0.0, rng, seeds=(3,)) + runs_of("2.0", "f1", -2.0, rng, seeds=(3,)))
    doc = recheck(cli, aid)
    assert doc["status"] == "data-changed"
    assert doc["runs_arrived"] == 24  # 6 blocks x 2 instances x 2 treatments
    assert doc["stored_fingerprint"] != doc["new_fingerprint"]
    assert doc["changes"] == []


def test_recheck_conclusion_changed_when_new_runs_undo_the_effect(campaign, cli, tmp_path):
    bt = blocktest(cli, "family=f1")
    treatment = next(r for r in bt["anova"] if r["source"] == "treatment")
    assert treatment["p"] < 0.05
    # two more seeds of stk@2.0 that use 2 pallets more than stk@1.0: on average no difference is left
    load(cli, tmp_path, "flip.csv", runs_of("2.0", "f1", 2.0, random.Random(8), seeds=(3, 4), noise=1.5))
    doc = recheck(cli, bt["analysis_id"])
    assert doc["status"] == "conclusion-changed"
    assert doc["changes"] == ["treatment effect: was significant, now not significant"]
    new_p = next(r for r in doc["new"]["anova"] if r["source"] == "treatment")["p"]
    assert new_p >= 0.05


def test_recheck_tampered_when_the_stored_result_is_edited(campaign, cli, location):
    from warehouse.store.connect import open_warehouse

    aid = blocktest(cli, "family=f1")["analysis_id"]
    w = open_warehouse(location)
    try:
        with w.engine.begin() as c:
            stored = c.execute(text("SELECT result FROM analyses WHERE id = :i"), {"i": aid}).scalar()
            doc = json.loads(stored)
            for row in doc["anova"]:
                if row["source"] == "treatment":
                    row["p"] = 0.5  # someone makes the effect look absent
            c.execute(text("UPDATE analyses SET result = :r WHERE id = :i"), {"r": json.dumps(doc), "i": aid})
    finally:
        w.close()
    out = recheck(cli, aid)
    assert out["status"] == "tampered"
    assert "edited after it was kept" in out["changes"][0]
    assert recall_one(cli, aid)["state"] == "tampered"
    assert [m["analysis_id"] for m in cli("recall", "--stale", "--json").json()["matches"]] == [aid]


@pytest.mark.parametrize("column, value", [
    ("metric", "seconds"),
    ("slice_parsed", '{"arms": [[{"key": "family", "op": "=", "values": ["f2"]}]]}'),
])
def test_recheck_tampered_when_what_it_reruns_is_edited(campaign, cli, location, column, value):
    from warehouse.store.connect import open_warehouse

    aid = blocktest(cli, "family=f1")["analysis_id"]
    w = open_warehouse(location)
    try:
        with w.engine.begin() as c:
            c.execute(text(f"UPDATE analyses SET {column} = :v WHERE id = :i"), {"v": value, "i": aid})
    finally:
        w.close()
    assert recheck(cli, aid)["status"] == "tampered"


# --- retraction --------------------------------------------------------------------------------

def test_retraction_flags_exactly_the_analyses_that_used_the_runs_and_removes_nothing(campaign, cli, location):
    from conftest import run_counts

    one = blocktest(cli, "family=f1")["analysis_id"]
    two = blocktest(cli, "family=f2")["analysis_id"]
    total = raw_run_count(location)
    assert total == 96
    assert run_counts(location)["retracted"] == 0

    r = cli("retract", "--slice", "family=f1 stk@2.0 seed=1", "--reason", "build 2.0 mis-counted", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["runs_retracted"] == 12  # 6 blocks x 2 instances, seed 1
    assert doc["stale_analyses"] == [one]
    rid = doc["retraction_id"]

    # nothing deleted: the rows are all there, the inventory counts them as retracted
    assert raw_run_count(location) == total
    inv = cli("inventory", "--json").json()
    assert inv["retracted"] == 12 and inv["runs"] == total - 12
    assert recall_one(cli, one)["state"] == "stale" and recall_one(cli, one)["stale_runs"] == 12
    assert recall_one(cli, two)["state"] == "fresh"
    assert [m["analysis_id"] for m in cli("recall", "--stale", "--json").json()["matches"]] == [one]
    back = recheck(cli, one)
    assert back["runs_withdrawn"] == 12 and back["status"] in ("data-changed", "conclusion-changed")
    assert recheck(cli, two)["status"] == "unchanged"

    # an analysis made after the retraction does not stand on the withdrawn runs
    three = blocktest(cli, "family=f1")["analysis_id"]
    assert recall_one(cli, three)["state"] == "fresh"

    # undo brings them back everywhere
    r = cli("retract", "--undo", str(rid), "--json")
    assert r.code == 0, r
    assert r.json()["runs_restored"] == 12
    inv = cli("inventory", "--json").json()
    assert inv["retracted"] == 0 and inv["runs"] == total
    assert recall_one(cli, one)["state"] == "fresh"
    assert recheck(cli, one)["status"] == "unchanged"
    assert cli("recall", "--stale", "--json").json()["matches"] == []
    # an undone retraction cannot be undone twice
    r = cli("retract", "--undo", str(rid))
    assert r.code == 2 and "already undone" in r.err


def test_retraction_of_runs_no_analysis_used_flags_none(campaign, cli, tmp_path):
    one = blocktest(cli, "family=f1")["analysis_id"]
    load(cli, tmp_path, "late.csv", runs_of("1.0", "f1", 0.0, random.Random(4), seeds=(7,)))
    doc = cli("retract", "--slice", "family=f1 seed=7", "--reason", "late batch", "--json").json()
    assert doc["runs_retracted"] == 12
    assert doc["stale_analyses"] == []  # those runs arrived after the analysis
    assert recall_one(cli, one)["state"] == "fresh"


def test_retract_that_matches_nothing_changes_nothing(campaign, cli):
    r = cli("retract", "--slice", "family=f1 seed=42", "--reason", "typo", "--json")
    assert r.code == 0, r
    assert r.json()["runs_retracted"] == 0 and r.json()["stale_analyses"] == []
    assert cli("inventory", "--json").json()["retracted"] == 0


@pytest.mark.parametrize("argv, words", [
    (["--reason", "x"], "retract needs --slice"),
    (["--slice", "family=f1"], "retract needs --reason"),
    (["--slice", "family=f9", "--reason", "x"], "no family 'f9'"),
    (["--undo", "77"], "no retraction 77"),
])
def test_retract_errors_are_one_line(campaign, cli, argv, words):
    r = cli("retract", *argv)
    assert r.code == 2 and r.err.count("\n") == 1 and words in r.err


# --- relative dates are stored absolute ------------------------------------------------------------

STAMP = re.compile(r"since=(\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ)")


def test_relative_dates_in_a_slice_are_stored_absolute(campaign, cli, location):
    before = time.time()
    aid = blocktest(cli, "since=30d family=f1")["analysis_id"]
    after = time.time()
    doc = recall_one(cli, aid)
    assert "30d" not in doc["slice"]
    m = STAMP.search(doc["slice"])
    assert m, doc["slice"]
    when = parse_when(m.group(1), "since")
    assert before - 30 * 86400 - 1 <= when <= after - 30 * 86400 + 1
    # the retraction's record keeps the absolute slice too
    r = cli("retract", "--slice", "since=7d family=f2 seed=2", "--reason", "drift", "--json")
    assert r.code == 0, r
    assert STAMP.search(r.json()["slice"]) and "7d" not in r.json()["slice"]
    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    try:
        with w.engine.connect() as c:
            stored = c.execute(text("SELECT slice FROM retractions")).scalar()
    finally:
        w.close()
    assert STAMP.search(stored) and "7d" not in stored


# --- keep and recall ---------------------------------------------------------------------------------

def test_keep_and_recall_by_word_tag_solver_and_state(campaign, cli):
    one = blocktest(cli, "family=f1")["analysis_id"]
    two = cli("versus", "stk@1.0", "--slice", "family=f2", "--metric", "pallets", "--json").json()["analysis_id"]
    r = cli("keep", "stk 2.0 packs the f1 orders onto fewer pallets", "--analysis", str(one), "--tag", "paper",
            "--tag", "q4", "--json")
    assert r.code == 0, r
    assert r.json()["analysis_id"] == one
    r = cli("keep", "on f2 too, 2.0 beats 1.0", "--tag", "paper", "--json")  # the last analysis by default
    assert r.code == 0 and r.json()["analysis_id"] == two

    def ids(*argv):
        r = cli("recall", *argv, "--json")
        assert r.code == 0, r
        return [m["analysis_id"] for m in r.json()["matches"]]

    assert ids("fewer") == [one]
    assert ids("beats") == [two]
    assert ids("--tag", "paper") == [two, one]  # newest first
    assert ids("--tag", "q4") == [one]
    assert ids("--tag", "paper", "--tag", "q4") == [one]
    assert ids("--tag", "nothing") == []
    assert ids("--solver", "stk@2.0") == [two, one]
    assert ids("--solver", "stk") == [two, one]
    assert ids("--solver", "other") == []
    assert ids("--stale") == []
    full = recall_one(cli, one)
    assert full["claims"][0]["text"] == "stk 2.0 packs the f1 orders onto fewer pallets"
    assert sorted(full["tags"]) == ["paper", "q4"]
    assert full["kind"] == "blocktest" and full["slice"] == "family=f1" and full["metric"] == "pallets"
    assert full["settings"]["collapse"]["failures"] == "drop"
    assert len(full["observations"]) == 12  # 2 treatments x 6 blocks
    assert "scipy" in full["software"]


def test_recall_of_an_unknown_id_is_exit_2_with_one_line(campaign, cli):
    r = cli("recall", "999")
    assert r.code == 2 and r.err.count("\n") == 1 and "no analysis 999" in r.err
    r = cli("recheck", "999")
    assert r.code == 2 and r.err.count("\n") == 1 and "no analysis 999" in r.err
    r = cli("keep", "a claim", "--analysis", "999")
    assert r.code == 2 and r.err.count("\n") == 1 and "no analysis 999" in r.err


def test_keep_needs_a_claim_and_an_analysis(location, cli):
    r = cli("keep", "something holds")
    assert r.code == 2 and r.err.count("\n") == 1 and "no analysis" in r.err
    r = cli("keep", "   ")
    assert r.code == 2 and "needs the claim" in r.err


def test_retraction_of_runs_without_the_metric_does_not_flag_the_analysis(campaign, cli, tmp_path):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    # the same treatments on the same instances, other seeds, measuring only seconds
    path = tmp_path / "seconds.csv"
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["solver", "version", "family", "group", "instance", "seed", "seconds"])
        for g in range(1, 7):
            w.writerow(["stk", "1.0", "f1", f"g{g}", "i1", 9, 1.5])
    assert cli("load", str(path), "--campaign", "c1").code == 0
    aid_after = blocktest(cli, "family=f1")["analysis_id"]
    doc = cli("retract", "--slice", "family=f1 seed=9", "--reason", "timer broken", "--json").json()
    assert doc["runs_retracted"] == 6
    assert doc["stale_analyses"] == []  # neither analysis used a pallets value from those runs
    assert recall_one(cli, aid)["state"] == "fresh" and recall_one(cli, aid_after)["state"] == "fresh"


# --- plans are analyses too --------------------------------------------------------------------

def test_a_plan_is_kept_so_a_claim_on_it_is_tied_to_it(campaign, cli):
    bt = blocktest(cli, "family=f1")["analysis_id"]
    plan = cli("plan", "--effect", "0.5", "--json").json()
    assert isinstance(plan["analysis_id"], int) and plan["analysis_id"] > bt
    r = cli("keep", "34 blocks are enough to see half a standard deviation", "--json")
    assert r.code == 0 and r.json()["analysis_id"] == plan["analysis_id"]
    assert recall_one(cli, plan["analysis_id"])["kind"] == "plan"
    assert recheck(cli, plan["analysis_id"])["status"] == "unchanged"


def test_a_plan_needs_no_warehouse(tmp_path, cli):
    r = cli("plan", "--effect", "0.5", "--json", warehouse=str(tmp_path / "nowhere.db"))
    assert r.code == 0, r
    assert r.json()["blocks_needed"] == 34 and r.json()["analysis_id"] is None
    assert not (tmp_path / "nowhere.db").exists()


def test_a_run_belongs_to_one_retraction_and_undo_brings_back_just_its_own(campaign, cli, location):
    total = raw_run_count(location)
    first = cli("retract", "--slice", "family=f1 seed=1", "--reason", "seed 1 bad", "--json").json()
    assert first["runs_retracted"] == 24  # 2 treatments x 6 blocks x 2 instances
    # withdrawing what is already withdrawn changes nothing
    again = cli("retract", "--slice", "retracted=yes", "--reason", "again", "--json").json()
    assert again["runs_retracted"] == 0 and again["retraction_id"] is None
    # an overlapping retraction takes only the runs still live
    second = cli("retract", "--slice", "family=f1 retracted=any", "--reason", "all of f1", "--json").json()
    assert second["runs_retracted"] == 24  # seed 2 only
    inv = cli("inventory", "--json").json()
    assert inv["retracted"] == 48 and inv["runs"] == total - 48
    restored = cli("retract", "--undo", str(first["retraction_id"]), "--json").json()
    assert restored["runs_restored"] == 24
    inv = cli("inventory", "--json").json()
    assert inv["retracted"] == 24 and inv["runs"] == total - 24
    peek = cli("peek", "--slice", "family=f1", "--json").json()
    assert sum(c["runs"] for c in peek["cells"]) == 24  # seed 1 is back, seed 2 still withdrawn


# --- the fingerprint does not depend on the order values were summed in --------------------------

def _cells_frame(sum_ok):
    import pandas as pd

    return pd.DataFrame({
        "treatment": ["a@1", "a@1", "b@1"], "block": ["f/g1", "f/g2", "f/g1"], "instance_id": [3, 4, 3],
        "n": [4, 4, 4], "n_ok": [4, 3, 4], "n_fail": [0, 1, 0], "id_sum": [10, 26, 42],
        "sum_ok": sum_ok, "sq_ok": [x * x / 4 for x in sum_ok],
    })


def test_the_fingerprint_is_the_same_for_sums_made_in_another_order():
    # 0.1 + 0.2 + 0.3 summed left to right and right to left differ in the last bit (IEEE 754
    # double rounding, common practice); the same runs must give the same fingerprint either way
    from warehouse.collapse.in_pandas import _fingerprint, fingerprint_v1
    from warehouse.select.slices import parse

    left, right = (0.1 + 0.2) + 0.3, 0.1 + (0.2 + 0.3)
    assert left != right
    st, sl = {"replicates": "mean"}, parse("family=f")
    a, b = _cells_frame([left, 2.0, 3.0]), _cells_frame([right, 2.0, 3.0])
    assert _fingerprint(a, st, "pallets", sl) == _fingerprint(b, st, "pallets", sl)
    # whereas a run more, or another run in its place, moves it
    c = _cells_frame([left, 2.0, 3.0])
    c.loc[1, "id_sum"] += 1
    assert _fingerprint(c, st, "pallets", sl) != _fingerprint(a, st, "pallets", sl)
    d = _cells_frame([left, 2.0, 3.0])
    d.loc[1, ["n", "n_ok"]] += 1
    assert _fingerprint(d, st, "pallets", sl) != _fingerprint(a, st, "pallets", sl)
    # the 0.1 hash is kept for analyses kept by 0.1, and differs from the current one
    assert fingerprint_v1(a, st, "pallets", sl) != _fingerprint(a, st, "pallets", sl)


def test_an_analysis_kept_with_the_earlier_fingerprint_rechecks_unchanged(campaign, cli, location, tmp_path):
    # an analysis kept by Blockyard 0.1 holds the 0.1 hash; on unchanged data it is still unchanged,
    # and new runs under its slice still make it data-changed
    from warehouse import ledger
    from warehouse.commands.session import Session

    aid = blocktest(cli, "family=f1")["analysis_id"]
    session = Session(location=location)
    wh = session.warehouse()
    st = ledger.get(wh, aid)
    old_fp = ledger.rerun(wh, st).collapsed.fingerprint_v1
    assert old_fp and old_fp != st.fingerprint
    with wh.engine.begin() as conn:
        row = conn.execute(text("SELECT kind, slice_text, settings, observations, result FROM analyses WHERE id = :i"),
                           {"i": aid}).one()
        dig = ledger.digest(row.kind, row.slice_text, row.settings, row.observations, old_fp, row.result)
        conn.execute(text("UPDATE analyses SET fingerprint = :f, result_digest = :d WHERE id = :i"),
                     {"f": old_fp, "d": dig, "i": aid})
    session.close()
    doc = recheck(cli, aid)
    assert doc["status"] == "unchanged" and doc["stored_fingerprint"] == old_fp
    load(cli, tmp_path, "more.csv", runs_of("1.0", "f1", 0.0, random.Random(99), seeds=(3,)))
    assert recheck(cli, aid)["status"] in ("data-changed", "conclusion-changed")


# --- recall marks what it cuts -------------------------------------------------------------------

def test_recall_marks_a_cut_claim_with_an_ellipsis(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    long_claim = ("stk 2.0 packs the f1 orders onto about two pallets fewer than stk 1.0 on every group, "
                  "seed and instance we ran")
    assert cli("keep", long_claim, "--analysis", str(aid)).code == 0
    row = next(l for l in cli("recall").out.splitlines() if l.startswith(str(aid)))
    assert "stk 2.0 packs the f1 orders onto" in row and "…" in row and long_claim not in row
    # with a second claim the count stays whole after the cut text
    assert cli("keep", "short", "--analysis", str(aid)).code == 0
    row = next(l for l in cli("recall").out.splitlines() if l.startswith(str(aid)))
    assert "… (+1 more)" in row
    # JSON and recall ID keep the claim whole
    assert recall_one(cli, aid)["claims"][0]["text"] == long_claim
    assert long_claim in cli("recall", str(aid)).out


def test_recall_leaves_text_that_fits_as_it_is(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    assert cli("keep", "2.0 needs fewer pallets", "--analysis", str(aid), "--tag", "paper").code == 0
    row = next(l for l in cli("recall").out.splitlines() if l.startswith(str(aid)))
    assert "2.0 needs fewer pallets" in row and "…" not in row


def test_cut_says_when_it_shortened():
    from warehouse.present.ledger import cut

    assert cut("pallets vs stk@1.0", 70) == "pallets vs stk@1.0"
    assert cut("x" * 70, 70) == "x" * 70
    shortened = cut("x" * 71, 70)
    assert len(shortened) == 70 and shortened.endswith("…")
    assert cut("two\nlines", 20) == "two lines"  # a break inside a claim would split the table's row


# --- plan --from: the source's state and the blocks its slice holds -------------------------------

def plan_json(cli, *argv) -> dict:
    r = cli("plan", *argv, "--json")
    assert r.code == 0, r
    return r.json()


def test_plan_from_a_stale_analysis_says_so(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    fresh = plan_json(cli, "--effect", "0.5", "--from", str(aid))
    assert fresh["from"]["stale"] is False and fresh["from"]["state"] == "fresh"
    assert not any("stale" in w for w in fresh["warnings"])
    assert "stale" not in cli("plan", "--effect", "0.5", "--from", str(aid)).out

    assert cli("retract", "--slice", "family=f1 stk@2.0 seed=1", "--reason", "build 2.0 mis-counted").code == 0
    doc = plan_json(cli, "--effect", "0.5", "--from", str(aid))
    assert doc["from"]["stale"] is True and doc["from"]["stale_runs"] == 12
    assert any(w.startswith(f"analysis {aid} is stale") for w in doc["warnings"])
    text = cli("plan", "--effect", "0.5", "--from", str(aid)).out
    assert f"caution   analysis {aid} is stale: 12 of the runs" in text
    # the F-test plan has its cautions too
    doc = plan_json(cli, "--means", "40,39,38.5", "--from", str(aid))
    assert doc["from"]["stale"] is True and any("is stale" in w for w in doc["warnings"])


def test_plan_from_says_how_many_more_blocks_it_needs(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]  # 6 blocks: f1/g1 .. f1/g6
    # d = 0.5 at 80 % power, two-sided 5 %: 34 blocks (Cohen's tables, from memory; as in test_analysis_commands)
    doc = plan_json(cli, "--effect", "0.5", "--from", str(aid))
    assert doc["blocks_needed"] == 34
    assert doc["from"]["blocks_held"] == 6 and doc["from"]["blocks_more"] == 28
    text = cli("plan", "--effect", "0.5", "--from", str(aid)).out
    assert f"needs 34 blocks; the slice of analysis {aid} holds 6: 28 more" in text
    # a difference of many sds needs few blocks: the slice holds enough
    doc = plan_json(cli, "--effect", "3", "--from", str(aid))
    assert doc["blocks_needed"] <= 6 and doc["from"]["blocks_more"] == 0
    assert f"the slice of analysis {aid} holds 6 blocks: enough" in cli("plan", "--effect", "3", "--from", str(aid)).out
    # without --from there is no slice to count
    assert "blocks_more" not in str(plan_json(cli, "--effect", "0.5"))


def test_a_plan_from_an_analysis_rechecks_unchanged(campaign, cli):
    aid = blocktest(cli, "family=f1")["analysis_id"]
    for argv in (("--effect", "0.5"), ("--means", "40,39,38.5"), ("--means", "40,39", "--blocks", "8")):
        plan = plan_json(cli, *argv, "--from", str(aid))["analysis_id"]
        assert recheck(cli, plan)["status"] == "unchanged", argv


def test_a_plan_kept_before_the_source_notes_still_rechecks_unchanged(campaign, cli, location):
    # a plan kept by an earlier version holds no state or block counts of its source
    from warehouse import ledger
    from warehouse.store.connect import open_warehouse

    aid = blocktest(cli, "family=f1")["analysis_id"]
    plan = plan_json(cli, "--means", "40,39,38.5", "--from", str(aid))["analysis_id"]
    w = open_warehouse(location)
    try:
        with w.engine.begin() as c:
            row = c.execute(text("SELECT kind, slice_text, settings, observations, fingerprint, result FROM analyses "
                                 "WHERE id = :i"), {"i": plan}).one()
            doc = json.loads(row.result)
            for key in ("state", "stale", "stale_runs", "blocks_held", "blocks_more"):
                doc["from"].pop(key)
            doc.pop("warnings")
            old = json.dumps(doc)
            dig = ledger.digest(row.kind, row.slice_text, row.settings, row.observations, row.fingerprint, old)
            c.execute(text("UPDATE analyses SET result = :r, result_digest = :d WHERE id = :i"),
                      {"r": old, "d": dig, "i": plan})
    finally:
        w.close()
    assert recheck(cli, plan)["status"] == "unchanged"


# --- undo while a reload holds the keys (load --again into the same campaign) -------------------

def _live_imports(location):
    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    try:
        with w.engine.connect() as c:
            return c.execute(text("SELECT import_id, count(*) FROM runs WHERE retraction_id IS NULL "
                                  "GROUP BY import_id ORDER BY import_id")).all()
    finally:
        w.close()


def _reload_into(cli, tmp_path, campaign):
    """A file of 4 runs loaded into nov (import 1), retracted (retraction 1), loaded again (import 2)."""
    runs = [{"solver": "stacker", "version": v, "family": "mixed-sku", "group": "g1", "instance": "i1", "seed": s,
             "finished_at": FINISHED, "pallets": 30 + s} for v in ("1.4", "1.6") for s in (1, 2)]
    path = write_runs(tmp_path / "nov.csv", runs)
    assert cli("load", path, "--campaign", "nov").code == 0
    assert cli("retract", "--slice", "campaign=nov", "--reason", "wrong layout", "--json").json()["retraction_id"] == 1
    r = cli("load", path, "--campaign", campaign, "--again", "--json")
    assert r.code == 0 and r.json()["imports"][0]["replaces"] == 1, r


def test_an_undo_that_would_put_two_live_runs_on_one_key_is_refused(cli, location, tmp_path):
    _reload_into(cli, tmp_path, "nov")
    r = cli("retract", "--undo", "1")
    assert r.code == 2 and r.out == "", r
    assert r.err.strip().splitlines() == [
        "blockyard: retraction 1 cannot be undone: 4 of its runs would be live beside the live runs of import 2 under "
        "the same keys in campaign nov (a campaign holds one live run per key); retract import 2's runs first: "
        'blockyard retract --slice "campaign=nov" --reason "...", then blockyard retract --undo 1']
    assert _live_imports(location) == [(2, 4)]  # nothing changed
    # the command it names clears the way; the other way round is refused alike
    assert cli("retract", "--slice", "campaign=nov", "--reason", "back to the first", "--json").json()["retraction_id"] == 2
    assert cli("retract", "--undo", "1", "--json").json()["runs_restored"] == 4
    assert _live_imports(location) == [(1, 4)]
    r = cli("retract", "--undo", "2")
    assert r.code == 2 and "4 of its runs would be live beside the live runs of import 1" in r.err, r
    assert _live_imports(location) == [(1, 4)]


def test_an_undo_goes_ahead_when_the_reload_went_into_another_campaign(cli, location, tmp_path):
    # campaigns do not share runs: the same keys in nov-fixed hold nothing in nov
    _reload_into(cli, tmp_path, "nov-fixed")
    assert cli("retract", "--undo", "1", "--json").json()["runs_restored"] == 4
    assert _live_imports(location) == [(1, 4), (2, 4)]
