"""The collapse in SQL (blocktest and versus, default settings) against the collapse in pandas.

The reference is the pandas collapse of the same slice, whose numbers test_collapse.py checks by
hand arithmetic. Both must give the same observations (to the last bits a different summation
order may move: relative 1e-12), the same notes, counts, dropped blocks, hosts and campaigns, and
exactly the same fingerprint, on SQLite and on PostgreSQL.
"""
from __future__ import annotations

import random

import pytest

from warehouse.collapse.observations import collapse
from warehouse.select.slices import parse
from warehouse.collapse.settings import Collapse
from warehouse.commands.session import Session

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


# --- the block summaries (schema 0006) ------------------------------------------------------------

@pytest.fixture
def whole(cli, tmp_path, location):
    """Campaigns in which every treatment ran every instance (the case the block summaries serve),
    with failures, cells with no successful run, seeds split between hosts, and a second campaign."""
    rng = random.Random(20261203)
    plan = [("oct", ["1.0", "2.0"], dict(fail=0.15, skip=0.0, seeds=6)),
            ("nov", ["2.0", "3.0", "3.1"], dict(fail=0.3, skip=0.0, groups=3, instances=4, seeds=8)),
            ("dec", ["1.0", "3.0"], dict(fail=0.0, skip=0.0, groups=2))]
    for k, (camp, versions, opts) in enumerate(plan):
        runs = campaign_runs(rng, versions, **opts)
        if camp == "dec":  # one instance on which every treatment failed: cells with no value anywhere
            for r in runs:
                if r["group"] == "g1" and r["instance"] == "f1-i1":
                    r.update(status="timeout", pallets="")
        r = cli("load", write_runs(tmp_path / f"whole{k}.csv", runs), "--campaign", camp)
        assert r.code == 0, r
    return location


def _block_rows(conn):
    from warehouse.store import schema as S
    from sqlalchemy import select

    B = S.block_stats
    cols = [c for c in B.c if c.name != "vsum"]
    rows = conn.execute(select(*cols, B.c.vsum).order_by(B.c.import_id, B.c.slot, B.c.solver_id, B.c.group_id)).all()
    return [tuple(r[:-1]) for r in rows], [r[-1] for r in rows]


def _cell_rows(conn):
    from sqlalchemy import select
    from warehouse.store import schema as S

    C = S.cell_stats
    keep = [c for c in C.c if c.name not in ("sum_ok", "sq_ok", "sum_fail_v")]  # sums in another order
    return sorted(tuple(r) for r in conn.execute(select(*keep)).all())


WHOLE_SLICES = ["campaign=oct", "campaign=nov", "campaign=nov family=f2", "version>=2.0 campaign=nov",
                "campaign=oct group=g1,g3", "stk@1.0,stk@2.0 campaign=oct", "campaign=dec",
                "campaign=oct family=f1 | campaign=dec family=f2"]


@pytest.mark.parametrize("metric", ["pallets", "seconds"])
def test_the_block_summaries_give_what_the_pandas_collapse_gives(whole, metric):
    from warehouse.collapse.in_sql import _rows_from_blocks
    from warehouse.select.resolve import Dims

    session = Session(location=whole)
    try:
        with session.warehouse().engine.connect() as conn:
            dims = Dims.load(conn)
            slot = dims.metrics[metric][1]
            notes = set()
            for text in WHOLE_SLICES:
                assert _rows_from_blocks(conn, parse(text), dims, slot) is not None, text  # the blocks were used
                slow = collapse(conn, parse(text), metric, Collapse(), cells=True)
                same(collapse(conn, parse(text), metric, Collapse(), cells=False), slow)
                notes |= {n.split()[1] for n in slow.notes}
            assert "failed" in notes
            if metric == "pallets":
                assert "cells" in notes  # cells with no successful run, counted from the blocks
            # stk@2.0 ran in two campaigns (a cell summed across imports), and treatments from two
            # imports share a block (whose shared instances must be found cell by cell): the cells
            for text in ("", "stk@3.1 campaign=nov | stk@1.0 campaign=dec"):
                assert _rows_from_blocks(conn, parse(text), dims, slot) is None, text
                same(collapse(conn, parse(text), metric, Collapse(), cells=False),
                     collapse(conn, parse(text), metric, Collapse(), cells=True))
            # an instance or host term is not one the blocks carry
            assert _rows_from_blocks(conn, parse("campaign=oct host=rack-a"), dims, slot) is None
    finally:
        session.close()


def test_the_block_summaries_step_aside_when_a_treatment_misses_instances(varied):
    from warehouse.collapse.in_sql import _rows_from_blocks
    from warehouse.select.resolve import Dims

    session = Session(location=varied)
    try:
        with session.warehouse().engine.connect() as conn:
            dims = Dims.load(conn)
            # in 'oct' some treatment never ran some instance: the shared instances must be found cell by cell
            assert _rows_from_blocks(conn, parse("campaign=oct"), dims, dims.metrics["pallets"][1]) is None
    finally:
        session.close()


def test_the_loader_writes_the_block_rows_a_rebuild_makes_and_retraction_keeps_them_in_step(whole, cli):
    from warehouse.store import blocks

    session = Session(location=whole)
    try:
        wh = session.warehouse()
        with wh.engine.connect() as conn:
            loaded_ints, loaded_sums = _block_rows(conn)
            loaded_cells = _cell_rows(conn)
            assert loaded_ints
        with wh.engine.begin() as conn:
            from sqlalchemy import select
            from warehouse.store import schema as S

            blocks.rebuild(conn, [r[0] for r in conn.execute(select(S.imports.c.id))])
        with wh.engine.connect() as conn:
            rebuilt_ints, rebuilt_sums = _block_rows(conn)
        assert rebuilt_ints == loaded_ints  # whole numbers exactly
        assert rebuilt_sums == pytest.approx(loaded_sums, rel=1e-12)
    finally:
        session.close()
    r = cli("retract", "--slice", "campaign=oct version=2.0 group=g2", "--reason", "a bad build")
    assert r.code == 0, r
    session = Session(location=whole)
    try:
        with session.warehouse().engine.connect() as conn:
            for text in ("campaign=oct", "campaign=oct family=f1"):
                same(collapse(conn, parse(text), "pallets", Collapse(), cells=False),
                     collapse(conn, parse(text), "pallets", Collapse(), cells=True))
            after_ints, _ = _block_rows(conn)
        assert after_ints != loaded_ints  # the retracted runs left the block rows
    finally:
        session.close()
    r = cli("retract", "--undo", "1")
    assert r.code == 0, r
    session = Session(location=whole)
    try:
        with session.warehouse().engine.connect() as conn:
            assert _block_rows(conn)[0] == loaded_ints  # and came back with the undo
            # so did the cells a retraction took away whole (an undo once rebuilt only the slots
            # of cells still present in its rectangle, and these had none left)
            assert _cell_rows(conn) == loaded_cells
    finally:
        session.close()
