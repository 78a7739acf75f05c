"""What a warehouse holds: counts and listings, each one SQL query.

The counts alone (`blockyard inventory`) are plain SQL through the standard library's sqlite3 on
a SQLite warehouse: the command then starts without SQLAlchemy (0.2 s of imports, eight times
`python -c pass`); listings and servers go through SQLAlchemy.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

from ..errors import InputError
from ..store.connect import Warehouse

KINDS = ("campaigns", "solvers", "families", "groups", "metrics", "imports", "hosts")


@dataclass
class Inventory:
    warehouse: str
    counts: dict[str, int]
    kind: str | None = None
    headers: list[str] = field(default_factory=list)
    rows: list[list] = field(default_factory=list)

    def to_dict(self) -> dict:
        d = dict(self.counts)
        d["warehouse"] = self.warehouse
        if self.kind:
            d[f"{self.kind}_list"] = [dict(zip(self.headers, r)) for r in self.rows]
        return d


def _when(epoch) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.gmtime(epoch)) if epoch else ""


def _moment(epoch) -> str | None:
    """A run's finish time as a since= or until= slice value takes it, to the second."""
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(epoch)) if epoch is not None else None


# the counts as one statement of plain SQL over the tables' own names (store/schema.py): the same
# figures as `counts`, which tests/test_startup.py holds side by side with this
_COUNTS_SQL = """SELECT
 (SELECT count(*) FROM campaigns), (SELECT count(DISTINCT name) FROM solvers), (SELECT count(*) FROM solvers),
 (SELECT count(*) FROM families), (SELECT count(*) FROM groups), (SELECT count(*) FROM instances),
 (SELECT count(*) FROM metrics), (SELECT count(*) FROM imports), (SELECT count(*) FROM hosts),
 (SELECT coalesce(sum(rows_loaded), 0) FROM imports),
 (SELECT coalesce(sum(runs), 0) FROM retractions WHERE undone_at IS NULL)"""
_COUNT_KEYS = ("campaigns", "solvers", "treatments", "families", "groups", "instances", "metrics", "imports", "hosts")


def plain_counts(con) -> dict[str, int]:
    """`counts` through a DB-API connection (sqlite3), without SQLAlchemy."""
    cur = con.cursor()
    try:
        cur.execute(_COUNTS_SQL)
        row = cur.fetchone()
    finally:
        cur.close()
    d = {k: int(v) for k, v in zip(_COUNT_KEYS, row)}
    total, retracted = int(row[-2]), int(row[-1])
    d["runs"] = total - retracted
    d["retracted"] = retracted
    return d


def counts(conn) -> dict[str, int]:
    from sqlalchemy import func, select

    from ..store import schema as S

    n = lambda t: conn.execute(select(func.count()).select_from(t)).scalar()  # noqa: E731
    # runs are never deleted, so the imports' own counts add up to the table without scanning it
    total = int(conn.execute(select(func.coalesce(func.sum(S.imports.c.rows_loaded), 0))).scalar())
    retracted = conn.execute(
        select(func.coalesce(func.sum(S.retractions.c.runs), 0)).where(S.retractions.c.undone_at.is_(None))
    ).scalar()
    # a solver is a name; a treatment is a solver at one version (one row of the solvers table)
    names = conn.execute(select(func.count(func.distinct(S.solvers.c.name)))).scalar()
    return {
        "campaigns": n(S.campaigns), "solvers": int(names), "treatments": n(S.solvers), "families": n(S.families),
        "groups": n(S.groups), "instances": n(S.instances), "metrics": n(S.metrics),
        "imports": n(S.imports), "hosts": n(S.hosts), "runs": total - int(retracted),
        "retracted": int(retracted),
    }


def inventory(wh: Warehouse, kind: str | None = None, limit: int | None = None) -> Inventory:
    if kind is not None and kind not in KINDS:
        from difflib import get_close_matches

        near = get_close_matches(kind, KINDS, n=1)
        hint = f" (did you mean '{near[0]}'?)" if near else ""
        if kind.lower().startswith("treatment"):
            hint = " (inventory solvers lists them: each solver with its versions)"
        from .slices import brief

        raise InputError(f"inventory: unknown listing '{brief(kind)}'{hint}; choose from {', '.join(KINDS)}")
    if kind is None and wh.is_sqlite:
        con = wh.sqlite()
        try:
            return Inventory(wh.display, plain_counts(con), kind)
        finally:
            con.close()
    from sqlalchemy import func, select

    from ..store import schema as S

    with wh.engine.connect() as conn:
        inv = Inventory(wh.display, counts(conn), kind)
        if kind is None:
            return inv
        cs = S.cell_stats
        # one metric slot per import is enough to count its live runs from the cell summaries
        first = select(cs.c.import_id, func.min(cs.c.slot).label("slot")).group_by(cs.c.import_id).subquery()
        cells = (select(cs.c.campaign_id, cs.c.solver_id, cs.c.n)
                 .join(first, (first.c.import_id == cs.c.import_id) & (first.c.slot == cs.c.slot)).subquery())
        if kind == "campaigns":
            per = select(cells.c.campaign_id, func.sum(cells.c.n).label("n")).group_by(cells.c.campaign_id).subquery()
            # the first and last finish time of the imports that hold live runs (the imports' own
            # time ranges, revision 0004; a wholly retracted import has no cell rows)
            live = select(cs.c.import_id).where(cs.c.import_id == S.imports.c.id).exists()
            times = (select(S.imports.c.campaign_id, func.min(S.imports.c.first_finished).label("first"),
                            func.max(S.imports.c.last_finished).label("last"))
                     .where(live).group_by(S.imports.c.campaign_id).subquery())
            q = (select(S.campaigns.c.name, func.coalesce(per.c.n, 0), S.campaigns.c.created_at, times.c.first,
                        times.c.last)
                 .select_from(S.campaigns.outerjoin(per, per.c.campaign_id == S.campaigns.c.id)
                              .outerjoin(times, times.c.campaign_id == S.campaigns.c.id))
                 .order_by(S.campaigns.c.name))
            inv.headers = ["campaign", "runs", "created", "first run", "last run"]
            inv.rows = [[a, int(b), _when(c), _moment(d), _moment(e)] for a, b, c, d, e in conn.execute(q)]
        elif kind == "solvers":
            from .resolve import Dims

            dims = Dims.load(conn)
            per = select(cells.c.solver_id, func.sum(cells.c.n).label("n")).group_by(cells.c.solver_id).subquery()
            q = (select(S.solvers.c.id, S.solvers.c.name, S.solvers.c.version, S.solvers.c.build,
                        S.solvers.c.params, func.coalesce(per.c.n, 0))
                 .select_from(S.solvers.outerjoin(per, per.c.solver_id == S.solvers.c.id)))
            from .versions import version_key

            # each solver with its versions, each version a treatment (what NAME@VERSION names in a slice)
            rows = sorted(([name, version, dims.treatment(i), b, p, int(n)] for i, name, version, b, p, n in conn.execute(q)),
                          key=lambda x: (x[0], version_key(x[1] or ""), x[2]))
            inv.headers = ["solver", "version", "treatment", "build", "parameters", "runs"]
            inv.rows = rows
        elif kind == "families":
            q = (select(S.families.c.name, func.count(func.distinct(S.groups.c.id)), func.count(func.distinct(S.instances.c.id)))
                 .select_from(S.families.outerjoin(S.groups).outerjoin(S.instances))
                 .group_by(S.families.c.id, S.families.c.name).order_by(S.families.c.name))
            inv.headers = ["family", "groups", "instances"]
            inv.rows = [list(x) for x in conn.execute(q)]
        elif kind == "groups":
            q = (select(S.families.c.name, S.groups.c.name, func.count(S.instances.c.id))
                 .select_from(S.groups.join(S.families).outerjoin(S.instances))
                 .group_by(S.groups.c.id, S.families.c.name, S.groups.c.name).order_by(S.families.c.name, S.groups.c.name))
            inv.headers = ["block", "instances"]
            inv.rows = [[f"{a}/{b}", c] for a, b, c in conn.execute(q)]
        elif kind == "metrics":
            q = select(S.metrics.c.name, S.metrics.c.sense, S.metrics.c.unit).order_by(S.metrics.c.name)
            inv.headers = ["metric", "better", "unit"]
            inv.rows = [[a, "lower" if b == "min" else "higher", c] for a, b, c in conn.execute(q)]
        elif kind == "hosts":
            hcells = (select(cs.c.host_id, cs.c.n)
                      .join(first, (first.c.import_id == cs.c.import_id) & (first.c.slot == cs.c.slot)).subquery())
            per = select(hcells.c.host_id, func.sum(hcells.c.n).label("n")).group_by(hcells.c.host_id).subquery()
            q = (select(S.hosts.c.name, func.coalesce(per.c.n, 0))
                 .select_from(S.hosts.outerjoin(per, per.c.host_id == S.hosts.c.id)).order_by(S.hosts.c.name))
            inv.headers = ["host", "runs"]
            inv.rows = [[a, int(b)] for a, b in conn.execute(q)]
        else:  # imports
            q = (select(S.imports.c.id, S.campaigns.c.name, S.imports.c.file_name, S.imports.c.replaces_import_id,
                        S.imports.c.rows_read, S.imports.c.rows_loaded, S.imports.c.rows_rejected,
                        S.imports.c.rows_skipped, S.imports.c.loaded_at, S.imports.c.sha256)
                 .join(S.campaigns, S.campaigns.c.id == S.imports.c.campaign_id).order_by(S.imports.c.id))
            # replaces: the wholly retracted import this one loaded again (load --again; revision 0008)
            inv.headers = ["import", "campaign", "file", "replaces", "read", "loaded", "rejected", "skipped",
                           "loaded at", "sha256"]
            inv.rows = [[a, b, c, r, d, e, f, g, _when(h), i[:12]] for a, b, c, r, d, e, f, g, h, i in conn.execute(q)]
        if limit is not None:
            inv.rows = inv.rows[:limit]
    return inv
