"""Loads of bytes loaded before: a file whose hash the warehouse holds is a duplicate, unless
`--again` loads it in place of an import whose runs are all retracted (revision 0008).

`earlier_imports` finds the imports of the same bytes; `replaced` decides whether a reload may
go in and which import it replaces (refusing, with the retract command to run first, while any
earlier import holds live runs); `replaced_chain` is that import and those it replaced in turn,
whose retracted runs hold no keys against the reload (runkey.py). The messages name an import
by a slice that takes its runs, as a user would type it.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

from sqlalchemy import func, select

from ..errors import InputError
from ..store import schema as S
from ..store.connect import Warehouse


@dataclass
class Earlier:
    """An earlier import of the same bytes, and how much of it is retracted."""

    id: int
    campaign: str
    campaign_id: int
    loaded_at: int
    loaded: int  # runs it stored
    retracted: int  # of those, retracted
    first_run_id: int | None
    last_run_id: int | None
    first_finished: int | None
    last_finished: int | None

    @property
    def live(self) -> int:
        return max(self.loaded - self.retracted, 0)

    @property
    def when(self) -> str:
        return time.strftime("%Y-%m-%d %H:%M", time.gmtime(self.loaded_at))

    @property
    def state(self) -> str:
        if not self.loaded:
            return "holds no runs"
        if not self.retracted:
            return "not retracted"
        if not self.live:
            return "wholly retracted"
        return f"partly retracted ({self.retracted} of {self.loaded} runs)"


def earlier_imports(wh: Warehouse, sha256: str) -> list[Earlier]:
    """The imports of these bytes, oldest first. Retracted runs are counted in each import's own id
    range (revision 0004), so the count costs no more than that import's runs."""
    I, R = S.imports, S.runs
    out = []
    with wh.engine.connect() as conn:
        rows = conn.execute(
            select(I.c.id, I.c.campaign_id, S.campaigns.c.name, I.c.loaded_at, I.c.rows_loaded, I.c.first_run_id,
                   I.c.last_run_id, I.c.first_finished, I.c.last_finished)
            .join(S.campaigns, S.campaigns.c.id == I.c.campaign_id)
            .where(I.c.sha256 == sha256).order_by(I.c.id)).all()
        for r in rows:
            retracted = 0
            if r.first_run_id is not None:
                retracted = conn.execute(select(func.count()).select_from(R).where(
                    R.c.id.between(r.first_run_id, r.last_run_id), R.c.import_id == r.id,
                    R.c.retraction_id.is_not(None))).scalar() or 0
            out.append(Earlier(r.id, r.name, r.campaign_id, r.loaded_at, r.rows_loaded or 0, int(retracted),
                                r.first_run_id, r.last_run_id, r.first_finished, r.last_finished))
    return out


def duplicate_message(earlier: list[Earlier]) -> str:
    head = earlier[-1]
    text = f"already loaded into campaign {head.campaign} on {head.when} UTC (import {head.id}); {head.state}"
    live = [e for e in earlier if e.live]
    if not live:
        return text + "; to load it again (with a corrected layout, say), add --again"
    if live[-1] is not head:
        e = live[-1]
        return text + f", but import {e.id} of the same bytes (campaign {e.campaign}) still has {e.live} live runs; nothing to do"
    if head.retracted:
        return text + "; nothing to do (to load it again, retract the rest of its runs first, then add --again)"
    return text + "; nothing to do"


def replaced(wh: Warehouse, shown: str, earlier: list[Earlier]) -> int | None:
    """The import a `--again` load replaces (None: these bytes are new to the warehouse); refused
    while an earlier import of them holds live runs."""
    if not earlier:
        return None
    live = [e for e in earlier if e.live]
    if live:
        raise InputError(_still_live_message(wh, shown, live[-1]))
    # the head of the chain: each import is replaced at most once (imports.ux_imports_reload)
    return earlier[-1].id



def _still_live_message(wh: Warehouse, shown: str, e: Earlier) -> str:
    with wh.engine.connect() as conn:
        how = _retract_command(conn, e)
    return (f"{shown}: --again loads a file whose earlier imports are wholly retracted, but import {e.id} "
            f"(campaign {e.campaign}, loaded {e.when} UTC) is {e.state}, with {e.live} live "
            f"{'run' if e.live == 1 else 'runs'}; retract them first: {how}")


def retract_command(conn, import_id: int) -> str:
    """The retract command that takes an import's live runs, as a one-line message gives it
    (also `ledger.undo_retraction`, naming the import that holds the keys it would restore)."""
    I = S.imports
    r = conn.execute(select(I.c.id, I.c.campaign_id, S.campaigns.c.name, I.c.loaded_at, I.c.rows_loaded,
                            I.c.first_run_id, I.c.last_run_id, I.c.first_finished, I.c.last_finished)
                     .join(S.campaigns, S.campaigns.c.id == I.c.campaign_id).where(I.c.id == import_id)).one()
    return _retract_command(conn, Earlier(r.id, r.name, r.campaign_id, r.loaded_at, r.rows_loaded or 0, 0,
                                           r.first_run_id, r.last_run_id, r.first_finished, r.last_finished))


def _retract_command(conn, e: Earlier) -> str:
    sl, exact = _slice_of_import(conn, e)
    how = f"blockyard retract --slice {_shell_word(sl)} --reason \"...\""
    if not exact:
        how += (f" (that slice also takes the live runs of campaign {e.campaign}'s other imports: narrow it "
                "with solver= or family= terms)")
    return how


def _slice_of_import(conn, e: Earlier) -> tuple[str, bool]:
    """Slice text that takes an import's live runs, and whether it takes no other live runs. The
    slice language has no term for an import: its campaign does when no other import of the
    campaign has live runs (the cell summaries hold live runs only); else its campaign and time
    range, when that range meets no other import's and every live run of it has a time."""
    C, I, R = S.cell_stats, S.imports, S.runs
    base = f"campaign={_slice_value(e.campaign)}"
    others = [r[0] for r in conn.execute(select(C.c.import_id).where(
        C.c.campaign_id == e.campaign_id, C.c.import_id != e.id).distinct())]
    if not others:
        return base, True
    if e.first_finished is None or e.first_run_id is None:
        return base, False
    untimed = conn.execute(select(func.count()).select_from(R).where(
        R.c.id.between(e.first_run_id, e.last_run_id), R.c.import_id == e.id, R.c.retraction_id.is_(None),
        R.c.finished_at.is_(None))).scalar()
    meets = conn.execute(select(func.count()).select_from(I).where(
        I.c.id.in_(others), I.c.first_finished <= e.last_finished, I.c.last_finished >= e.first_finished)).scalar()
    if untimed or meets:
        return base, False

    def iso(t: int) -> str:
        return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))

    # until is exclusive (a run finished before it): one second past the last
    return f"{base} since={iso(e.first_finished)} until={iso(e.last_finished + 1)}", True


def _slice_value(v: str) -> str:
    """A name as a slice term's value: quoted where a space, comma, bar, quote or operator would
    otherwise end or split it (the slice language's own rules, docs/analysis.md)."""
    import re

    if v and not re.search(r"[\s,|'\"=<>!~]", v):
        return v
    if '"' not in v:
        return f'"{v}"'
    if "'" not in v:
        return f"'{v}'"
    return "".join(f"'{part}'" if part[0] == '"' else f'"{part}"' for part in re.findall(r'"+|[^"]+', v))


def replaced_chain(conn, replaces: int | None) -> tuple[int, ...]:
    """The import a reload replaces and those that one replaced in turn (imports.replaces_import_id):
    all wholly retracted (`--again` loads no file with live runs), and none of their retracted
    runs holds a key against the reload."""
    chain: list[int] = []
    while replaces is not None and replaces not in chain:
        chain.append(int(replaces))
        replaces = conn.execute(select(S.imports.c.replaces_import_id).where(S.imports.c.id == replaces)).scalar()
    return tuple(chain)


def _shell_word(text: str) -> str:
    """A value as it is typed in a shell command that a message suggests: in double quotes when
    nothing in it means something to a POSIX shell there, else as shlex quotes it."""
    import re
    import shlex

    if re.fullmatch(r'[^"$`\\!]*', text):
        return f'"{text}"'
    return shlex.quote(text)
