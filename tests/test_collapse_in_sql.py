"""The collapse in SQL (blocktest and versus, default settings) against the collapse in pandas.

The reference is the pandas collapse of the same slice, whose numbers test_collapse.py checks by
hand arithmetic. Both must give the same observations (to the last bits a different summation
order may move: relative 1e-12), the same notes, counts, dropped blocks, hosts and campaigns, and
exactly the same fingerprint, on SQLite and on PostgreSQL.
"""
from __future__ import annotations

import random

import pytest

from warehouse.collapse import collapse
from warehouse.select.slices import parse
from warehouse.session import Collapse, Session

from test_collapse import write_runs


def campaign_runs(rng: random.Random, versions, families=("f1", "f2"), groups=4, instances=3, seeds=3,
                  fail=0.1, skip=0.1, hosts=("rack-a", "rack-b"), hash_of=None) -> list[dict]:
    runs = []
    for v in versions:
        for fam in families:
            for g in range(1, groups + 1):
                for i in range(1, instances + 1):
                    if rng.random() < skip:  # this treatment never ran this instance
                        continue
                    for s in range(1, seeds + 1):
                        failed = rng.random() < fail
                        runs.append(dict(
                            solver="stk", version=v, family=fam, group=f"g{g}", instance=f"{fam}-i{i}", seed=s,
                            status="timeout" if failed else "ok", host=rng.choice(hosts),
                            instance_hash=(hash_of(fam, g, i) if hash_of else ""),
                            pallets="" if failed and rng.random() < 0.5 else round(20 + 3 * g + rng.gauss(0, 1), 3),
                            seconds=round(abs(rng.gauss(10, 3)), 4)))
    return runs


@pytest.fixture
def varied(cli, tmp_path, location):
    rng = random.Random(20261202)
    plan = [
        ("oct", ["1.0", "2.0"], {}),
        ("nov", ["2.0", "3.0", "3.1"], dict(fail=0.25, skip=0.2)),
        ("nov", ["4.0"], dict(families=("f1",), skip=0.4)),  # a second file into the same campaign
        ("dec", ["1.0", "3.0"], dict(groups=2, instances=2, seeds=1, hosts=("rack-c",))),
        # two content hashes for one instance name: kept apart, with a caution
        ("hash", ["1.0", "2.0"], dict(families=("f3",), hash_of=lambda f, g, i: f"h{i}" if g != 1 else f"h{i}-{rng.randint(0, 1)}")),
    ]
    for k, (camp, versions, opts) in enumerate(plan):
        r = cli("load", write_runs(tmp_path / f"runs{k}.csv", campaign_runs(rng, versions, **opts)), "--campaign", camp)
        assert r.code == 0, r
    return location


SLICES = ["", "campaign=oct", "campaign=nov", "family=f1", "campaign=nov | family=f2", "host=rack-a",
          "group=g1,g2", "campaign=hash", "version>=2.0", "campaign=dec"]


def same(a, b) -> None:
    assert a.fingerprint == b.fingerprint
    assert a.treatments == b.treatments and a.blocks == b.blocks
    assert a.dropped_blocks == b.dropped_blocks
    assert (a.runs_in_slice, a.runs_used, a.instances_used, a.max_run_id) == (
        b.runs_in_slice, b.runs_used, b.instances_used, b.max_run_id)
    assert a.notes == b.notes
    assert a.hash_conflicts == b.hash_conflicts
    assert a.hosts == b.hosts and a.campaigns == b.campaigns
    assert list(a.obs.columns) == list(b.obs.columns)
    assert a.obs[["treatment", "block"]].values.tolist() == b.obs[["treatment", "block"]].values.tolist()
    for col in ("instances", "runs", "failed"):
        assert a.obs[col].tolist() == b.obs[col].tolist(), col
        assert a.obs[col].dtype == b.obs[col].dtype, col
    assert a.obs["value"].tolist() == pytest.approx(b.obs["value"].tolist(), rel=1e-12)


@pytest.mark.parametrize("holes", ["drop", "keep"])
@pytest.mark.parametrize("metric", ["pallets", "seconds"])
def test_the_sql_collapse_gives_what_the_pandas_collapse_gives(varied, holes, metric):
    session = Session(location=varied)
    try:
        seen = set()
        with session.warehouse().engine.connect() as conn:
            for text in SLICES:
                settings = Collapse(holes=holes)
                slow = collapse(conn, parse(text), metric, settings, cells=True)
                quick = collapse(conn, parse(text), metric, settings, cells=False)
                assert quick._cells is None and slow._cells is not None  # the SQL way was taken
                same(quick, slow)
                seen |= {"conflicts"} if slow.hash_conflicts else set()
                seen |= {"holes"} if slow.dropped_blocks else set()
                seen |= {n.split()[1] for n in slow.notes}  # failed / cells / instances
    finally:
        session.close()
    # the data holds every case the two ways could part on
    assert {"conflicts", "holes", "failed", "instances"} <= seen, seen
    if metric == "pallets":
        assert "cells" in seen, seen  # cells with no successful run


def test_the_sql_collapse_sees_retractions_as_the_pandas_one_does(varied, cli):
    r = cli("retract", "--slice", "campaign=nov version=3.0 group=g2", "--reason", "a bad build")
    assert r.code == 0, r
    session = Session(location=varied)
    try:
        with session.warehouse().engine.connect() as conn:
            for text in ("campaign=nov", ""):
                same(collapse(conn, parse(text), "pallets", Collapse(), cells=False),
                     collapse(conn, parse(text), "pallets", Collapse(), cells=True))
    finally:
        session.close()


def test_the_sql_collapse_leaves_the_instance_table_out_and_says_so(varied):
    session = Session(location=varied)
    try:
        with session.warehouse().engine.connect() as conn:
            quick = collapse(conn, parse("campaign=oct"), "pallets", Collapse(), cells=False)
    finally:
        session.close()
    with pytest.raises(RuntimeError, match="cells=True"):
        quick.cells


def test_blocktest_and_versus_keep_the_fingerprint_a_recheck_finds(varied, cli):
    # the command takes the SQL way, the re-check the pandas way: nothing changed, so unchanged
    for argv in (("blocktest", "--slice", "campaign=oct", "--metric", "pallets"),
                 ("blocktest", "--slice", "campaign=nov", "--metric", "pallets", "--holes", "keep"),
                 ("versus", "stk@1.0", "--slice", "campaign=oct", "--metric", "seconds")):
        r = cli(*argv, "--json")
        assert r.code == 0, r
        again = cli("recheck", str(r.json()["analysis_id"]), "--json")
        assert again.code == 0, again
        assert again.json()["status"] == "unchanged", again.json()
