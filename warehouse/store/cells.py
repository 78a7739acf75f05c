"""Keeping the cell summaries (schema.cell_stats) in step with the runs.

The loader adds each file's cells from the chunks it writes (ingest/cellsums.py, no second pass
over the runs); retraction and its undo rebuild the cells they touch from the live runs, in SQL.
"""
from __future__ import annotations

from sqlalchemy import and_, case, delete, func, insert, select

from . import schema as S

R = S.runs
C = S.cell_stats
C_IMPORTS = S.imports
KEY = ["solver_id", "instance_id", "host_id"]
SUMS = ["n", "n_ok", "sum_ok", "sq_ok", "n_fail", "n_fail_v", "sum_fail_v", "id_sum"]
COLUMNS = ["campaign_id", "import_id", "solver_id", "instance_id", "host_id", "slot", "n", "n_ok", "sum_ok",
           "sq_ok", "min_ok", "max_ok", "n_fail", "n_fail_v", "sum_fail_v", "id_sum", "id_max"]


def run_aggregates(v, status=R.c.status, ident=R.c.id):
    """The per-cell aggregates of metric column v over runs (also used straight on a slice)."""
    ok = (status == 0) & v.is_not(None)
    bad = status != 0
    return [
        func.count().label("n"),
        func.sum(case((ok, 1), else_=0)).label("n_ok"),
        func.sum(case((ok, v), else_=None)).label("sum_ok"),
        # a square below the float range is 0 (PostgreSQL raises on underflow instead of rounding)
        func.sum(case((ok & (func.abs(v) > 1e-150), v * v), (ok, 0.0), else_=None)).label("sq_ok"),
        func.min(case((ok, v), else_=None)).label("min_ok"),
        func.max(case((ok, v), else_=None)).label("max_ok"),
        func.sum(case((bad, 1), else_=0)).label("n_fail"),
        func.sum(case((bad & v.is_not(None), 1), else_=0)).label("n_fail_v"),
        func.sum(case((bad & v.is_not(None), v), else_=None)).label("sum_fail_v"),
        func.sum(ident).label("id_sum"),
        func.max(ident).label("id_max"),
    ]


def cell_aggregates():
    """The same aggregates, summed again over cell rows."""
    return [func.sum(C.c.n).label("n"), func.sum(C.c.n_ok).label("n_ok"), func.sum(C.c.sum_ok).label("sum_ok"),
            func.sum(C.c.sq_ok).label("sq_ok"), func.min(C.c.min_ok).label("min_ok"),
            func.max(C.c.max_ok).label("max_ok"), func.sum(C.c.n_fail).label("n_fail"),
            func.sum(C.c.n_fail_v).label("n_fail_v"), func.sum(C.c.sum_fail_v).label("sum_fail_v"),
            func.sum(C.c.id_sum).label("id_sum"), func.max(C.c.id_max).label("id_max")]


def write_rows(conn, dialect: str, rows: list[tuple]) -> None:
    if not rows:
        return
    raw = conn.connection.driver_connection
    cols = ", ".join(COLUMNS)
    if dialect == "sqlite":
        raw.executemany(f"INSERT INTO cell_stats ({cols}) VALUES ({', '.join('?' * len(COLUMNS))})", rows)
    else:
        cur = raw.cursor()
        with cur.copy(f"COPY cell_stats ({cols}) FROM STDIN") as cp:
            for r in rows:
                cp.write_row(r)


def copy_binary(conn, payload: bytes, table: str) -> None:
    """A server: cell rows as one binary COPY payload, COLUMNS order (ingest/cellsums.CellSums.copy_payload),
    into cell_stats or a new campaign's table of its own (store/partitions.fresh_cells)."""
    if payload:
        cur = conn.connection.driver_connection.cursor()
        with cur.copy(f"COPY {table} ({', '.join(COLUMNS)}) FROM STDIN (FORMAT binary)") as cp:
            cp.write(payload)


def refresh_statistics(engine, campaign_id: int, import_id: int, added: int | None = None) -> None:
    """A server, after a load has committed: ANALYZE the campaign's cell summaries and the block
    summaries when they have no planner statistics yet or the load added more than a tenth of
    their rows (`added`, counted here when not given; the share at which autovacuum would
    analyze them, a minute or so later; PostgreSQL documentation, "Populating a Database": run
    ANALYZE after loading much data). Without statistics the planner took a one-family slice of
    a new 510,000-run warehouse for a handful of cells and joined them to the instances in a
    nested loop: 0.21 s a statement instead of 0.02, and 0.5 s a blocktest instead of 0.1
    (docs/performance.md). The campaign's partition of cell_stats alone (revision 0014): a slice
    of the campaign reads its statistics, and ANALYZE of the partitioned table would read every
    campaign's. Outside the load's transaction, so that loads side by side never wait on one
    another's ANALYZE; a team member who does not own the tables is skipped by the server with a
    notice, and any failure here leaves the committed load as it is."""
    try:
        with engine.connect() as conn:
            conn = conn.execution_options(isolation_level="AUTOCOMMIT")
            table = f"cells_c{int(campaign_id)}"
            known = conn.exec_driver_sql(f"SELECT reltuples FROM pg_class WHERE oid = to_regclass('{table}')").scalar()
            if added is None:
                added = conn.execute(select(func.count()).select_from(C).where(C.c.import_id == import_id)).scalar()
            if known is None or known < 0 or added > 0.1 * known:
                # the columns the slices filter, join and group on: the sums and counts are only
                # read, and their statistics were two thirds of the ANALYZE (80 -> 30 ms)
                conn.exec_driver_sql(f"ANALYZE {table} (campaign_id, import_id, solver_id, instance_id, host_id, slot)")
                conn.exec_driver_sql("ANALYZE block_stats (campaign_id, import_id, slot, solver_id, group_id)")
    except Exception:  # (statistics only: the load itself is stored)
        pass


def touched(conn, run_condition) -> list[tuple]:
    """The (import, solver, instance, campaign) keys of the cells holding runs that match."""
    return conn.execute(select(R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.campaign_id)
                        .where(run_condition).distinct()).all()


def rebuild(conn, keys: list[tuple]) -> int:
    """Recompute the cells of these (import, solver, instance, campaign) keys from the live runs,
    and the block summaries of their imports from those cells."""
    if not keys:
        return 0
    from . import blocks

    touched = _rebuild_cells(conn, keys)
    blocks.rebuild(conn, {k[0] for k in keys})
    return touched


def _rebuild_cells(conn, keys: list[tuple]) -> int:
    campaigns = sorted({k[3] for k in keys})
    imports = sorted({k[0] for k in keys})
    solvers = sorted({k[1] for k in keys})
    instances = sorted({k[2] for k in keys})
    touched = 0
    from .ranges import id_ranges

    spans = id_ranges(conn, C_IMPORTS.c.id.in_(imports))
    for i in range(0, len(instances), 5000):
        part = instances[i:i + 5000]
        rect_c = and_(C.c.import_id.in_(imports), C.c.solver_id.in_(solvers), C.c.instance_id.in_(part))
        # the imports' id ranges: the runs are read range by range (SQLite has no index on their key)
        rect_r = and_(spans, R.c.campaign_id.in_(campaigns), R.c.solver_id.in_(solvers), R.c.instance_id.in_(part),
                      R.c.import_id.in_(imports))
        # the slots to make cells in: those the imports have cells in, and any metric with a value
        # on these runs. (Not just the slots of the cells now in the rectangle: an undo brings back
        # cells a retraction took away whole, and the rectangle may hold none of them.)
        slots = _slots(conn, imports, rect_r)
        conn.execute(delete(C).where(rect_c))
        for slot in slots:
            v = R.c[f"v{int(slot)}"]
            q = (select(R.c.campaign_id, R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.host_id,
                        _literal(slot),
                        *run_aggregates(v))
                 .where(rect_r, R.c.retraction_id.is_(None))
                 .group_by(R.c.campaign_id, R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.host_id))
            touched += conn.execute(insert(C).from_select(COLUMNS, q)).rowcount or 0
    return touched


def _slots(conn, imports: list[int], rect_r) -> list[int]:
    have = {int(r[0]) for r in conn.execute(select(C.c.slot).where(C.c.import_id.in_(imports)).distinct())}
    for (slot,) in conn.execute(select(S.metrics.c.slot)):
        if int(slot) not in have:
            v = R.c[f"v{int(slot)}"]
            if conn.execute(select(R.c.id).where(rect_r, v.is_not(None)).limit(1)).first() is not None:
                have.add(int(slot))
    return sorted(have)


def _literal(slot: int):
    from sqlalchemy import literal

    return literal(int(slot), S.SmallInteger).label("slot")


def from_runs(conn, import_id: int, lo: int, hi: int) -> None:
    """The cells of one import, summed from its stored runs (ids lo..hi), in SQL."""
    slots = [r[0] for r in conn.execute(select(S.metrics.c.slot))]
    rng = and_(R.c.id.between(lo, hi), R.c.import_id == import_id, R.c.retraction_id.is_(None))
    conn.execute(delete(C).where(C.c.import_id == import_id))
    for slot in slots:
        v = R.c[f"v{int(slot)}"]
        has = conn.execute(select(func.count()).select_from(R).where(rng, v.is_not(None))).scalar()
        if not has:
            continue
        q = (select(R.c.campaign_id, R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.host_id, _literal(slot),
                    *run_aggregates(v)).where(rng)
             .group_by(R.c.campaign_id, R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.host_id))
        conn.execute(insert(C).from_select(COLUMNS, q))
