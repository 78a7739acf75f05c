"""keep, recall, recheck, retract: the ledger's commands."""
from __future__ import annotations

import re
from dataclasses import dataclass

from .registry import Done, add_json, args, command
from ..errors import InputError
from .session import Session
from ..shown import Shown


def _keep_args(p):
    p.add_argument("claim", metavar="CLAIM", help="the sentence you stand behind, in quotes")
    p.add_argument("--analysis", metavar="ID", help="the analysis it rests on (default: the last one)")
    p.add_argument("--tag", action="append", default=[], metavar="T", help="a tag to find it by (repeatable)")
    add_json(p)


@command("keep", "store a claim with the analysis that backs it, with tags", 'blockyard keep "1.6 uses fewer pallets than 1.4" --tag paper')
@args(_keep_args)
def cmd_keep(session: Session, a) -> Done:
    from .. import ledger

    wh = session.warehouse()
    analysis = ledger.parse_id(a.analysis, "--analysis") if a.analysis is not None else session.last_analysis
    doc = ledger.keep(wh, a.claim, analysis, a.tag)
    tags = f" [{', '.join(a.tag)}]" if a.tag else ""
    return Done(f"kept claim {doc['claim_id']} on analysis {doc['analysis_id']}{tags}: {doc['text']}", doc)


def _recall_args(p):
    p.add_argument("what", nargs="?", metavar="ID|TEXT", help="an analysis id to show in full, or words to search for")
    p.add_argument("--tag", action="append", default=[], metavar="T", help="only analyses with a claim tagged T")
    p.add_argument("--solver", metavar="S", help="only analyses involving this solver (NAME or NAME@VERSION)")
    p.add_argument("--since", metavar="DATE", help="only analyses made since DATE (2026-11-01, 7d, ...)")
    p.add_argument("--stale", action="store_true", help="only analyses that are stale or tampered")
    p.add_argument("--limit", type=int, default=None, help="show at most this many")
    add_json(p)


@dataclass
class RecallList(Shown):
    items: list

    def to_dict(self) -> dict:
        from ..present.ledger import summary_doc

        return {"matches": [summary_doc(s) for s in self.items]}

    def render(self) -> str:
        from ..present.ledger import render_recall_list

        return render_recall_list(self.items)


@dataclass
class RecallOne(Shown):
    item: object

    def to_dict(self) -> dict:
        from ..present.ledger import full_doc

        return full_doc(self.item)

    def render(self) -> str:
        from ..present.ledger import render_recall_one

        return render_recall_one(self.item)


@command("recall", "find stored analyses and claims by id, words, tag, solver or date", 'blockyard recall pallets --tag paper')
@args(_recall_args)
def cmd_recall(session: Session, a):
    from .. import ledger

    wh = session.warehouse()
    filtered = a.tag or a.solver or a.since or a.stale
    # a signed number is a mistyped id, not words to search for
    if a.what is not None and re.fullmatch(r"[-+]?[0-9]+", a.what.strip()) and not filtered:
        return RecallOne(ledger.get(wh, ledger.parse_id(a.what, "recall")))
    return RecallList(ledger.recall(wh, a.what, a.tag, a.solver, a.since, a.stale, a.limit))


def _recheck_args(p):
    p.add_argument("id", metavar="ID", help="the stored analysis to re-run on today's data")
    p.add_argument("--renew", action="store_true",
                   help="when today's data give another result, store it as a new analysis that renews this one "
                   "and move this one's claims to it (all in one transaction; this one stays as kept)")
    add_json(p)


@dataclass
class RecheckResult(Shown):
    rc: object

    def to_dict(self) -> dict:
        return self.rc.to_dict()

    def render(self) -> str:
        from ..present.ledger import render_recheck

        return render_recheck(self.rc)


@command("recheck", "re-run a stored analysis on today's data and say what changed; --renew keeps the re-run",
         "blockyard recheck 17 --renew")
@args(_recheck_args)
def cmd_recheck(session: Session, a) -> RecheckResult:
    from .. import ledger

    renew = bool(getattr(a, "renew", False))
    rc = ledger.recheck(session.warehouse(), ledger.parse_id(a.id, "recheck"), renew=renew)
    if rc.stored_analysis is not None:  # a claim kept next rests on the renewal
        session.last_analysis = rc.stored_analysis
    return RecheckResult(rc)


def _retract_args(p):
    p.add_argument("--slice", metavar="SLICE", help="the runs to withdraw (required unless --undo)")
    p.add_argument("--reason", metavar="TEXT", help="why they are withdrawn (required)")
    p.add_argument("--undo", type=int, metavar="RETRACTION", help="bring back the runs of an earlier retraction")
    add_json(p)


@command("retract", "withdraw runs (never deleted); flags the stored analyses that used them",
         'blockyard retract --slice "campaign=nov-tuning host=rack-b version=1.5" --reason "build mis-counted pallets"')
@args(_retract_args)
def cmd_retract(session: Session, a) -> Done:
    from .. import ledger
    from ..select.slices import parse

    wh = session.warehouse()
    if a.undo is not None:
        doc = ledger.undo_retraction(wh, a.undo)
        return Done(f"retraction {doc['retraction_id']} undone: {doc['runs_restored']} runs are back in every slice", doc)
    if not a.slice:
        raise InputError("retract needs --slice naming the runs (the focus is not used, to avoid surprises)")
    doc = ledger.retract(wh, parse(a.slice).absolute(), a.reason or "")
    if not doc["retraction_id"]:
        return Done(doc["message"], doc)
    stale = doc["stale_analyses"]
    lines = [f"retracted {doc['runs_retracted']} runs (retraction {doc['retraction_id']}): {doc['reason']}",
             "they are kept, marked withdrawn, and left out of every slice; undo with "
             f"blockyard retract --undo {doc['retraction_id']}"]
    if stale:
        lines.append(f"stale now: analyses {', '.join(map(str, stale))} used these runs; recheck them (blockyard recheck ID)")
    else:
        lines.append("no stored analysis used these runs")
    return Done("\n".join(lines), doc)
