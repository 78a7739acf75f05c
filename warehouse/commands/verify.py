"""Checking a warehouse end to end: verify (and verify --repair)."""
from __future__ import annotations

from dataclasses import dataclass, field

from .registry import add_json, args, command
from .session import Session
from ..shown import Shown

WRONG = 3  # the exit status when something does not hold (0 when all holds, 2 for a user's mistake)


def ledger_check(conn):
    """Every stored analysis against the digest written with it: an edit to a kept record shows."""
    from sqlalchemy import select

    from .. import ledger
    from ..store import schema as S
    from ..store.audit import Check

    A = S.analyses
    chk = Check("ledger", "every stored analysis against its digest")
    for row in conn.execute(select(A.c.id, A.c.kind, A.c.slice_text, A.c.settings, A.c.observations,
                                   A.c.fingerprint, A.c.result, A.c.result_digest).order_by(A.c.id)):
        if ledger.digest(row.kind, row.slice_text, row.settings, row.observations, row.fingerprint,
                         row.result) != row.result_digest:
            chk.add(f"analysis {row.id} ({row.kind}): its record does not match its digest (edited outside Blockyard)")
    return chk


@dataclass
class VerifyResult(Shown):
    where: str
    checks: list
    repaired: int | None = None  # imports whose summaries were rebuilt (--repair), or None
    after: list = field(default_factory=list)  # the summary checks again, after a repair

    @property
    def ok(self) -> bool:
        final = {c.name: c for c in self.checks}
        final.update({c.name: c for c in self.after})
        return all(c.ok for c in final.values())

    @property
    def exit_status(self) -> int:
        return 0 if self.ok else WRONG

    def to_dict(self) -> dict:
        d = {"warehouse": self.where, "ok": self.ok, "checks": [c.to_dict() for c in self.checks]}
        if self.repaired is not None:
            d["repaired_imports"] = self.repaired
            d["after_repair"] = [c.to_dict() for c in self.after]
        return d

    def errors(self) -> list[str]:
        return [] if self.ok else ["the warehouse does not hold together; see above (exit status 3)"]

    def render(self) -> str:
        lines = [f"verify    {self.where}"]
        for c in self.checks:
            lines.append(_line(c))
            lines += [f"            {f}" for f in c.found]
            if c.count > len(c.found):
                lines.append(f"            ... and {c.count - len(c.found)} more")
        if self.repaired is not None:
            lines.append(f"repaired  the cell and block summaries of {self.repaired} imports, made again from the live "
                         "runs (runs, imports and the ledger untouched)")
            lines += [_line(c) for c in self.after]
        summaries_off = any(not c.ok for c in self.checks if c.name in ("cells", "blocks"))
        if self.ok:
            lines.append("all holds")
        elif summaries_off and self.repaired is None:
            lines.append("caution   analyses read the summaries: until they are repaired, results may not match the runs; "
                         "blockyard verify --repair makes them again from the runs")
        if any(not c.ok for c in self.checks if c.name == "ledger"):
            lines.append("caution   an edited analysis reads 'tampered' in recall and recheck; its claims cannot be trusted")
        if any(not c.ok for c in self.checks if c.name == "integrity"):
            lines.append("caution   the file itself is damaged: copy it aside and restore it from a backup before loading more")
        return "\n".join(lines)


def _line(c) -> str:
    if c.skipped:
        return f"  {c.name:<9} skipped: {c.skipped}"
    word = "holds" if c.ok else f"{c.count} {'finding' if c.count == 1 else 'findings'}"
    return f"  {c.name:<9} {word:<14} {c.about}"


def _verify_args(p):
    p.add_argument("--repair", action="store_true",
                   help="after saying what differs, make the cell and block summaries again from the live runs "
                        "(never touches runs, imports or the ledger)")
    p.epilog = ("Checks: the database file's integrity (SQLite), each import's runs against its count and id range, "
                "one live run per key in a campaign, "
                "the cell and block summaries against the live runs, every stored analysis against its digest. "
                "Exit status 0 when all holds, 3 when something does not.")
    add_json(p)


@command("verify", "check a warehouse end to end: the file, the imports, the summaries and the ledger",
         "blockyard verify --repair")
@args(_verify_args)
def cmd_verify(session: Session, a) -> VerifyResult:
    from ..errors import StorageError
    from ..store import audit

    wh = session.warehouse()
    with wh.engine.connect() as conn:
        checks = audit.audit(conn) + [ledger_check(conn)]
        conn.rollback()
    res = VerifyResult(wh.display, checks)
    if a.repair:
        if wh.read_only:
            raise StorageError(f"cannot repair warehouse {wh.display}: it is read-only here ({wh.read_only}); "
                               "nothing was changed")
        with wh.write() as conn:
            with conn.begin():
                res.repaired = audit.repair(conn)
            res.after = [audit.cells(conn), audit.blocks(conn)]
            conn.rollback()
    return res
