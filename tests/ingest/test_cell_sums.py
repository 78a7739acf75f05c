"""The cell summaries a load writes equal the same sums taken over the stored runs in SQL."""
from __future__ import annotations

import math

from sqlalchemy import select, text

from warehouse.ingest.cellsums import MERGE_AT, CellSums
from warehouse.store import cells
from warehouse.store import schema as S

from .kit import write


def _cells(conn) -> dict:
    rows = conn.execute(select(*[S.cell_stats.c[c] for c in cells.COLUMNS])).all()
    return {(r.import_id, r.solver_id, r.instance_id, r.host_id, r.slot): tuple(r) for r in rows}


def _close(a, b) -> bool:
    if a is None or b is None:
        return a is b
    if isinstance(a, float) or isinstance(b, float):
        return math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-9)
    return a == b


def test_loaded_cells_equal_the_sql_sums_over_the_runs(wh, tmp_path):
    from warehouse.ingest.load import load_file

    lines = ["solver,version,group,instance,seed,status,host,pallets,seconds"]
    for k in range(3000):
        status = "timeout" if k % 7 == 0 else "ok"
        pallets = "" if status == "timeout" and k % 2 else str(20 + k % 11)
        lines.append(f"s{k % 3},1.{k % 2},g{k % 5},i{k % 40},{k // 120},{status},{'' if k % 9 == 0 else 'rack-' + str(k % 2)},"
                     f"{pallets},{0.5 + (k % 13) / 4}")
    path = write(tmp_path / "runs.csv", "\n".join(lines) + "\n")
    rep = load_file(wh, path, "c")
    assert rep.rows_loaded == 3000
    with wh.engine.connect() as conn:
        written = _cells(conn)
        lo, hi = conn.execute(text("SELECT min(id), max(id) FROM runs")).one()
    assert len(written) > 100
    with wh.write() as conn:
        with conn.begin() as trans:
            cells.from_runs(conn, rep.import_id, lo, hi)
            summed = _cells(conn)
            trans.rollback()
    assert written.keys() == summed.keys()
    for key, row in written.items():
        assert all(_close(a, b) for a, b in zip(row, summed[key])), (key, row, summed[key])


def test_merging_keeps_the_sums(monkeypatch):
    import numpy as np

    rng = np.random.default_rng(3)
    n = 5000
    ids = np.arange(1, n + 1)
    solver, instance = rng.integers(1, 4, n), rng.integers(1, 50, n)
    host = rng.integers(-1, 2, n)
    status = np.where(rng.random(n) < 0.2, 1, 0)
    v = np.where(rng.random(n) < 0.1, np.nan, rng.random(n))
    whole = CellSums()
    whole.add(ids, solver, instance, host, status, {1: v})
    import warehouse.ingest.cellsums as C

    monkeypatch.setattr(C, "MERGE_AT", 10)  # merge after nearly every piece
    pieces = CellSums()
    for lo in range(0, n, 700):
        sl = slice(lo, lo + 700)
        pieces.add(ids[sl], solver[sl], instance[sl], host[sl], status[sl], {1: v[sl]})
    assert MERGE_AT > 10
    a = {r[2:6]: r for r in whole.rows(1, 1)}
    b = {r[2:6]: r for r in pieces.rows(1, 1)}
    assert a.keys() == b.keys()
    for k in a:
        assert all(_close(x, y) for x, y in zip(a[k], b[k]))
    # the counts add up to the runs: every run is in exactly one cell
    assert sum(r[6] for r in a.values()) == n


def test_the_loader_writes_cells_in_the_store_s_column_order():
    from warehouse.ingest import cellsums

    assert cellsums.COLUMNS == cells.COLUMNS


def test_keys_too_wide_for_one_number_are_grouped_the_same():
    import numpy as np

    from warehouse.ingest.cellsums import _groups

    keys = np.array([[2**40, 5, -1], [1, 5, 2], [2**40, 5, -1], [1, 2**40, 2]], dtype=np.int64)
    order, starts, distinct = _groups(keys)
    assert sorted(map(tuple, distinct.tolist())) == sorted({tuple(k) for k in keys.tolist()})
    assert len(starts) == 3
