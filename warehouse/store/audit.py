"""Checking a warehouse against itself: the database's own integrity check, the summaries against
sums made again from the live runs, and each import's id range and count against its runs.

The summaries (cell and block rows) are what analyses read, so an edit made to the runs outside
Blockyard (a value changed, a run deleted, inserted or moved) would go unseen by every analysis
until the summaries are compared with the runs again: that is what `audit` does, read-only. It
reads every live run once per metric slot (the same GROUP BY a rebuild runs), so it costs about
what a rebuild costs; it is an occasional check, not part of an analysis. `repair` rebuilds the
summaries from the runs (never the runs, the imports or the ledger).
"""
from __future__ import annotations

from dataclasses import dataclass, field

from sqlalchemy import and_, func, select

from . import schema as S
from .cells import run_aggregates

R, C, I = S.runs, S.cell_stats, S.imports
CELL_KEY = ["import_id", "solver_id", "instance_id", "host_id", "slot"]
COUNTS = ["n", "n_ok", "n_fail", "n_fail_v", "id_sum", "id_max"]
SUMS = ["sum_ok", "sq_ok", "min_ok", "max_ok", "sum_fail_v"]
SHOWN = 5  # findings named one by one per check; the rest are counted


@dataclass
class Check:
    """One check's outcome: what it looked at, and each thing it found wrong (worded for a person)."""

    name: str
    about: str
    found: list[str] = field(default_factory=list)
    count: int = 0  # how many findings in all (found names the first few)
    skipped: str | None = None  # why the check could not run here

    @property
    def ok(self) -> bool:
        return self.count == 0

    def add(self, text: str) -> None:
        self.count += 1
        if len(self.found) < SHOWN:
            self.found.append(text)

    def to_dict(self) -> dict:
        return {"check": self.name, "about": self.about, "ok": self.ok, "count": self.count, "found": self.found,
                "skipped": self.skipped}


def integrity(conn) -> Check:
    """SQLite's own integrity check (pages, indexes, free lists). PostgreSQL keeps no such check
    that a client may run without an extension; the server's own checksums and WAL stand there."""
    chk = Check("integrity", "the database file's own integrity check")
    if conn.dialect.name != "sqlite":
        chk.skipped = "PostgreSQL: no built-in integrity check a client can run (the server checks its own pages)"
        return chk
    for (line,) in conn.exec_driver_sql("PRAGMA integrity_check").all():
        if line != "ok":
            chk.add(str(line))
    return chk


def _expected_cells(conn, slot: int):
    """The cell rows a rebuild would make for this slot: every live run's cell, in the imports
    that hold cell rows of the slot or a live value in it."""
    v = R.c[f"v{int(slot)}"]
    holders = select(C.c.import_id).where(C.c.slot == slot).union(
        select(R.c.import_id).where(R.c.retraction_id.is_(None), v.is_not(None)))
    q = (select(R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.host_id, *run_aggregates(v))
         .where(R.c.retraction_id.is_(None), R.c.import_id.in_(holders))
         .group_by(R.c.import_id, R.c.solver_id, R.c.instance_id, R.c.host_id))
    return conn.execute(q).all()


def _names(conn) -> tuple[dict, dict, dict]:
    solvers = {r.id: f"{r.name}@{r.version}" for r in conn.execute(select(S.solvers.c.id, S.solvers.c.name,
                                                                        S.solvers.c.version))}
    instances = {r.id: r.name for r in conn.execute(select(S.instances.c.id, S.instances.c.name))}
    metrics = {r.slot: r.name for r in conn.execute(select(S.metrics.c.slot, S.metrics.c.name))}
    return solvers, instances, metrics


def _close(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    a, b = float(a), float(b)
    return a == b or abs(a - b) <= 1e-9 * max(abs(a), abs(b))  # sums in another order differ in the last bits


def cells(conn) -> Check:
    """The cell summaries against sums made again from the live runs."""
    chk = Check("cells", "the cell summaries against the live runs")
    solvers, instances, metrics = _names(conn)
    slots = sorted({int(s) for (s,) in conn.execute(select(S.metrics.c.slot))} |
                   {int(s) for (s,) in conn.execute(select(C.c.slot).distinct())})
    have = {c.name for c in S.runs.columns}
    from .value_columns import present

    columns = present(conn)
    for slot in slots:
        if f"v{slot}" not in have or slot not in columns:
            continue
        want = {tuple(r[:4]): r for r in _expected_cells(conn, slot)}
        stored = {}
        for r in conn.execute(select(C.c.import_id, C.c.solver_id, C.c.instance_id, C.c.host_id,
                                     *[C.c[k] for k in COUNTS + SUMS]).where(C.c.slot == slot)):
            stored[tuple(r[:4])] = r
        metric = metrics.get(slot, f"slot {slot}")

        def where(key):
            return (f"import {key[0]}, {solvers.get(key[1], key[1])} on instance "
                    f"{instances.get(key[2], key[2])}, metric {metric}")

        for key in sorted(set(want) | set(stored), key=lambda k: tuple(-1 if x is None else x for x in k)):
            w, s = want.get(key), stored.get(key)
            if s is None:
                chk.add(f"{where(key)}: {w.n} live runs have no cell summary")
            elif w is None:
                chk.add(f"{where(key)}: a cell summary counts {s.n} runs that are not there")
            else:
                bad = [k for k in COUNTS if int(getattr(w, k) or 0) != int(getattr(s, k) or 0)]
                bad += [k for k in SUMS if not _close(getattr(w, k), getattr(s, k))]
                if bad:
                    shown = ", ".join(f"{k} {getattr(s, k)} stored, {getattr(w, k)} in the runs" for k in bad[:3])
                    chk.add(f"{where(key)}: {shown}")
    return chk


def blocks(conn) -> Check:
    """The block summaries against the rows the cell summaries make."""
    from . import blocks as B

    chk = Check("blocks", "the block summaries against the cell summaries")
    imports = [int(i) for (i,) in conn.execute(select(C.c.import_id).distinct().union(
        select(S.block_stats.c.import_id).distinct()))]
    key_len = 5  # campaign, import, slot, solver, group
    for import_id in sorted(imports):
        want = {tuple(r[:key_len]): tuple(r) for r in B.rows_of(conn, import_id)}
        stored = {tuple(r[:key_len]): tuple(r) for r in conn.execute(
            select(*[S.block_stats.c[k] for k in B.COLUMNS]).where(S.block_stats.c.import_id == import_id))}
        for key in sorted(set(want) | set(stored)):
            w, s = want.get(key), stored.get(key)
            if w is None or s is None or any(not _close(a, b) if isinstance(a, float) or isinstance(b, float)
                                             else a != b for a, b in zip(w, s)):
                what = "missing" if s is None else "not made from any cell" if w is None else "differs from its cells"
                chk.add(f"import {import_id}, metric slot {key[2]}, solver {key[3]}, group {key[4]}: block summary {what}")
    return chk


def imports(conn) -> Check:
    """Each import's id range and run count against the runs that carry its id; the names the
    runs and summaries point at; one live run per key in a campaign."""
    chk = Check("imports", "each import's runs: their count, their id range, the names they point at and their keys")
    got = {r.import_id: r for r in conn.execute(
        select(R.c.import_id, func.count().label("n"), func.min(R.c.id).label("lo"), func.max(R.c.id).label("hi"))
        .group_by(R.c.import_id))}
    for imp in conn.execute(select(I.c.id, I.c.rows_loaded, I.c.first_run_id, I.c.last_run_id).order_by(I.c.id)):
        r = got.get(imp.id)
        n = 0 if r is None else int(r.n)
        if n != int(imp.rows_loaded):
            chk.add(f"import {imp.id}: {imp.rows_loaded} runs loaded, {n} in the warehouse")
        if r is not None and (imp.first_run_id is None or r.lo < imp.first_run_id or r.hi > imp.last_run_id):
            chk.add(f"import {imp.id}: runs {r.lo}..{r.hi} lie outside its id range "
                    f"{imp.first_run_id}..{imp.last_run_id} (slices would not see them)")
    strays = conn.execute(select(func.count()).select_from(R).where(~R.c.import_id.in_(select(I.c.id)))).scalar()
    if strays:
        chk.add(f"{strays} runs belong to no import")
    # the names a run, a cell and a block summary point at: PostgreSQL holds no reference
    # constraint on them (revisions 0009 and 0012: a load writes ids it took from these tables
    # itself), so they are checked here
    names = (("campaign_id", S.campaigns, "campaign"), ("solver_id", S.solvers, "solver"),
             ("instance_id", S.instances, "instance"), ("host_id", S.hosts, "host"),
             ("group_id", S.groups, "group"), ("import_id", I, "import"))
    for table, rows in ((R, "runs"), (C, "cell summaries"), (S.block_stats, "block summaries")):
        for col, parent, what in names:
            if col not in table.c or (table is R and col == "import_id"):  # (runs: counted above)
                continue
            lost = conn.execute(select(func.count()).select_from(table).where(
                table.c[col].is_not(None), ~table.c[col].in_(select(parent.c.id)))).scalar()
            if lost:
                chk.add(f"{lost} {rows} name a{'n' if what == 'import' else ''} {what} id that is not in the "
                        f"warehouse ({what}s)")
    # one live run per key in a campaign: no index holds the whole table to that (a load proves
    # its runs new, and a campaign's partition on PostgreSQL gets a key only when a later load
    # needs one: ingest/runkey.py, revisions 0007 and 0013), so a run put in by hand is found here
    key = [R.c.campaign_id, R.c.solver_id, R.c.instance_id, R.c.seed, R.c.replicate]
    twice = select(*key).where(R.c.retraction_id.is_(None)).group_by(*key).having(func.count() > 1).subquery()
    named = {i: name for i, name in conn.execute(select(S.campaigns.c.id, S.campaigns.c.name))}
    shared = conn.execute(select(twice.c.campaign_id, func.count()).group_by(twice.c.campaign_id)
                          .order_by(twice.c.campaign_id)).all()
    for campaign_id, n in shared:
        chk.add(f"campaign {named.get(campaign_id, f'id {campaign_id}')}: {n} run key{'s are' if n > 1 else ' is'} "
                "held by more than one live run (a campaign holds one live run per solver, instance, seed and replicate)")
    # a run whose id lies in another import's range is read with that import by a date slice (an
    # import's range is a few rows; each is a range lookup on the runs' primary key)
    crossed = conn.execute(select(func.count()).select_from(
        R.join(I, and_(R.c.id.between(I.c.first_run_id, I.c.last_run_id), R.c.import_id != I.c.id)))).scalar()
    if crossed:
        chk.add(f"{crossed} runs lie in another import's id range")
    return chk


def audit(conn) -> list[Check]:
    """Every check of the store, in the order a reader would look (file, imports, cells, blocks)."""
    return [integrity(conn), imports(conn), cells(conn), blocks(conn)]


def repair(conn) -> int:
    """Make every cell and block summary again from the live runs. Returns the imports rebuilt."""
    from sqlalchemy import delete

    from . import blocks as B
    from .cells import from_runs

    spans = conn.execute(select(R.c.import_id, func.min(R.c.id), func.max(R.c.id)).group_by(R.c.import_id)).all()
    conn.execute(delete(C))
    for import_id, lo, hi in spans:
        from_runs(conn, int(import_id), int(lo), int(hi))
    everyone = [int(i) for (i,) in conn.execute(select(I.c.id))]
    conn.execute(delete(S.block_stats))
    B.rebuild(conn, everyone)
    return len(spans)

