"""Turning a parsed slice into a SQL condition on runs, through the small dimension tables.

Names, versions and globs are matched in Python against the dimension tables (a few thousand
rows at most), so the condition on runs is a set of integer-key tests that the indexes serve.
"""
from __future__ import annotations

import fnmatch
from dataclasses import dataclass

from sqlalchemy import and_, false, not_, or_, select, true

from ..errors import SliceError
from ..store import schema as S
from ..store.ranges import id_ranges
from .slices import STATUSES, Slice, Term, _suggest, brief, parse_when
from .versions import compare

R = S.runs


@dataclass
class Dims:
    """A snapshot of the small tables: what names exist, for resolving and for completion."""

    solvers: dict[int, tuple[str, str, str, str]]  # id -> (name, version, build, parameter set)
    campaigns: dict[int, str]
    families: dict[int, str]
    groups: dict[int, tuple[int, str]]  # id -> (family id, name)
    hosts: dict[int, str]
    metrics: dict[str, tuple[int, int, str, str]]  # name -> (id, slot, sense, unit)

    @staticmethod
    def load(conn) -> "Dims":
        return Dims(
            solvers={r.id: (r.name, r.version, r.build, r.params) for r in conn.execute(select(S.solvers))},
            campaigns={r.id: r.name for r in conn.execute(select(S.campaigns.c.id, S.campaigns.c.name))},
            families={r.id: r.name for r in conn.execute(select(S.families))},
            groups={r.id: (r.family_id, r.name) for r in conn.execute(select(S.groups))},
            hosts={r.id: r.name for r in conn.execute(select(S.hosts))},
            metrics={r.name: (r.id, r.slot, r.sense, r.unit) for r in conn.execute(select(S.metrics))},
        )

    def treatment(self, solver_id: int) -> str:
        """NAME@VERSION, with +BUILD and [PARAMETERS] where they tell treatments of that name apart."""
        name, version, build, params = self.solvers[solver_id]
        label = f"{name}@{version}" if version else name
        if build:
            same = [s for s in self.solvers.values() if s[0] == name and s[1] == version]
            if len({s[2] for s in same}) > 1:
                label += f"+{build}"
        if params:
            same = [s for s in self.solvers.values() if s[0] == name and s[1] == version and s[2] == build]
            if len({s[3] for s in same}) > 1:
                label += f"[{params}]"
        return label

    def block(self, group_id: int) -> str:
        fam, name = self.groups[group_id]
        return f"{self.families[fam]}/{name}"

    def values(self, key: str) -> list[str]:
        """Known values of a slice key, for suggestions and completion."""
        if key == "solver":
            return sorted({s[0] for s in self.solvers.values()})
        if key == "version":
            from .versions import version_sort_key

            return sorted({s[1] for s in self.solvers.values() if s[1]}, key=version_sort_key)
        if key == "treatment":
            return sorted({self.treatment(i) for i in self.solvers})
        if key == "campaign":
            return sorted(self.campaigns.values())
        if key == "family":
            return sorted(self.families.values())
        if key == "group":
            return sorted({g[1] for g in self.groups.values()} | {self.block(i) for i in self.groups})
        if key == "host":
            return sorted(self.hosts.values())
        if key == "status":
            return list(STATUSES)
        if key == "retracted":
            return ["no", "yes", "any"]
        return []


def _match(op: str, values: tuple[str, ...], candidate: str) -> bool:
    if op == "~":
        return any(fnmatch.fnmatchcase(candidate, v) for v in values)
    hit = candidate in values
    return not hit if op == "!=" else hit


def _ids(mapping: dict[int, str], term: Term, n: int, what: str) -> list[int]:
    names = set(mapping.values())
    if term.op == "=":
        for v in term.values:
            if v not in names:
                raise SliceError(f"slice term {n} '{brief(term.text())}': no {what} '{brief(v)}' in this warehouse{_suggest(v, names)}")
    positive = "~" if term.op == "~" else "="
    return [i for i, name in mapping.items() if _match(positive, term.values, name)]


def _in(column, ids: list[int], negate: bool):
    if not ids:
        return true() if negate else false()
    cond = column.in_(ids)
    return not_(cond) if negate else cond


def _version_ok(op: str, value: str, version: str) -> bool:
    c = compare(version, value)
    return {"<": c < 0, "<=": c <= 0, ">": c > 0, ">=": c >= 0}[op]


def _term_condition(term: Term, n: int, dims: Dims, conn, T=R):
    neg = term.op == "!="
    key = term.key
    if key == "treatment":
        wanted = set()
        for v in term.values:
            name, _, version = v.partition("@")
            # NAME@VERSION takes in every build and parameter set; a label as peek shows it
            # (NAME@VERSION+BUILD, NAME@VERSION[PARAMETERS]) names just that one
            ids = [i for i, s in dims.solvers.items() if (s[0] == name and s[1] == version) or dims.treatment(i) == v]
            if not ids:
                raise SliceError(f"slice term {n} '{brief(term.text())}': no treatment '{brief(v)}' in this warehouse{_suggest(v, dims.values('treatment'))}")
            wanted.update(ids)
        return T.c.solver_id.in_(sorted(wanted))
    if key == "solver":
        return _in(T.c.solver_id, _ids({i: s[0] for i, s in dims.solvers.items()}, term, n, "solver"), neg)
    if key == "version":
        if term.op in ("<", "<=", ">", ">="):
            ids = [i for i, s in dims.solvers.items() if s[1] and _version_ok(term.op, term.values[0], s[1])]
            return _in(T.c.solver_id, ids, False)
        return _in(T.c.solver_id, _ids({i: s[1] for i, s in dims.solvers.items()}, term, n, "version"), neg)
    if key == "campaign":
        ids = _ids(dims.campaigns, term, n, "campaign")
        cond = _in(T.c.campaign_id, ids, neg)
        if T is R and ids and not neg:
            # the runs of a campaign lie in its imports' id ranges: SQLite has no index on the
            # runs' campaign (revision 0007), so a slice reads those ranges, not the whole table
            cond = and_(cond, id_ranges(conn, S.imports.c.campaign_id.in_(ids), T))
        return cond
    if key == "host":
        cond = _in(T.c.host_id, _ids(dims.hosts, term, n, "host"), neg)
        return or_(cond, T.c.host_id.is_(None)) if neg else cond
    if key in ("family", "group"):
        if key == "family":
            fam_ids = set(_ids(dims.families, term, n, "family"))
            gids = [g for g, (f, _) in dims.groups.items() if f in fam_ids]
        else:
            short = {g: name for g, (_, name) in dims.groups.items()}
            full = {g: dims.block(g) for g in dims.groups}
            if term.op == "=":
                for v in term.values:
                    if v not in short.values() and v not in full.values():
                        raise SliceError(f"slice term {n} '{brief(term.text())}': no group '{brief(v)}' in this warehouse{_suggest(v, dims.values('group'))}")
            positive = "~" if term.op == "~" else "="
            gids = [g for g in dims.groups if _match(positive, term.values, short[g]) or _match(positive, term.values, full[g])]
        if "instance_id" not in T.c:  # the block summaries carry the group itself
            return _in(T.c.group_id, sorted(gids), neg)
        sub = select(S.instances.c.id).where(S.instances.c.group_id.in_(gids or [-1]))
        return not_(T.c.instance_id.in_(sub)) if neg else T.c.instance_id.in_(sub)
    if key == "instance":
        if term.op == "~":
            names = [r[0] for r in conn.execute(select(S.instances.c.name).distinct())]
            hits = [x for x in names if _match("~", term.values, x)]
            sub = select(S.instances.c.id).where(S.instances.c.name.in_(hits or ["\x00"]))
        else:
            sub = select(S.instances.c.id).where(S.instances.c.name.in_(list(term.values)))
        return not_(T.c.instance_id.in_(sub)) if neg else T.c.instance_id.in_(sub)
    if key == "status":
        positive = "~" if term.op == "~" else "="
        codes = [S.STATUS_CODES[s] for s in STATUSES if _match(positive, term.values, s)]
        return _in(T.c.status, codes, neg)
    if key == "seed":
        if term.op == "~":
            raise SliceError(f"slice term {n} '{brief(term.text())}': seeds are numbers; use = != < <= > >=")
        vals = [int(v) for v in term.values]
        if term.op in ("=", "!="):
            return _in(T.c.seed, vals, neg)
        col = T.c.seed
        return {"<": col < vals[0], "<=": col <= vals[0], ">": col > vals[0], ">=": col >= vals[0]}[term.op]
    if key == "since":
        t = parse_when(term.values[0], "since")
        return and_(T.c.finished_at >= t, id_ranges(conn, S.imports.c.last_finished >= t, T))
    if key == "until":
        t = parse_when(term.values[0], "until")
        return and_(T.c.finished_at < t, id_ranges(conn, S.imports.c.first_finished < t, T))
    raise SliceError(f"slice term {n}: key {key} is not handled")  # pragma: no cover


def condition(sl: Slice, dims: Dims, conn, retracted: str | None = None, table=None):
    """The WHERE condition on runs for a slice. Retracted runs are out unless the slice asks.

    With `table` (the cell summaries, which hold live runs only) the same terms apply to its
    columns; see `cells_can_answer`.
    """
    T = R if table is None else table
    arms = []
    n = 0
    for arm in sl.arms:
        parts = []
        want = retracted
        for term in arm:
            n += 1
            if term.key == "retracted":
                want = want or term.values[0]
                continue
            parts.append(_term_condition(term, n, dims, conn, T))
        want = want or "no"
        if T is R and want == "no":  # (cell summaries hold live runs only)
            parts.append(R.c.retraction_id.is_(None))
        elif T is R and want == "yes":
            parts.append(R.c.retraction_id.is_not(None))
        arms.append(and_(true(), *parts))
    return arms[0] if len(arms) == 1 else or_(*arms)


CELL_KEYS = {"treatment", "solver", "version", "campaign", "family", "group", "instance", "host"}


def cells_can_answer(sl: Slice) -> bool:
    """True when every term of the slice is one the cell summaries carry (and no retracted runs)."""
    return all(t.key in CELL_KEYS for arm in sl.arms for t in arm)


BLOCK_KEYS = {"treatment", "solver", "version", "campaign", "family", "group"}


def blocks_can_answer(sl: Slice) -> bool:
    """True when every term of the slice is one the block summaries carry (whole campaigns,
    treatments and blocks: no instance, host, status, seed, date or retracted term)."""
    return all(t.key in BLOCK_KEYS for arm in sl.arms for t in arm)
