"""`blockyard demo`: generate the invented campaign, load it, and walk the main job."""
from __future__ import annotations

import argparse
from pathlib import Path

from ..commands.analyse import cmd_blocktest, cmd_peek, cmd_plan, cmd_versus
from ..commands.guard import cmd_guard
from ..commands.ledger import cmd_keep, cmd_recall, cmd_recheck, cmd_retract
from ..commands.load import cmd_load
from ..commands.noise import cmd_noise
from ..commands.look import cmd_inventory
from ..commands.registry import Done, add_json, args, command, table
from ..commands.report import cmd_export
from ..commands.session import Session
from ..errors import BlockyardError

STEPS = table(cmd_load, cmd_inventory, cmd_peek, cmd_blocktest, cmd_versus, cmd_guard, cmd_noise, cmd_plan, cmd_keep, cmd_recall, cmd_retract, cmd_recheck,
              cmd_export)


def _step(session: Session, name: str, **kw):
    from ..commands.yard import Yard

    ns = argparse.Namespace(json=False, **kw)
    return Yard(session=session).call(STEPS[name], ns)


def run_demo(folder: str, json_mode: bool = False) -> Done:
    from .scenario import generate
    from ..store.connect import init_warehouse

    root = Path(folder).expanduser()
    root.mkdir(parents=True, exist_ok=True)
    db = root / "demo.db"
    for suffix in ("", "-wal", "-shm"):
        Path(str(db) + suffix).unlink(missing_ok=True)  # the demo's own file, rebuilt each time
    generate(root)
    init_warehouse(str(db)).close()
    session = Session(location=str(db))
    files = root / "files"
    out: list[str] = [f"demo warehouse {db}", ""]
    doc: dict = {"warehouse": str(db), "steps": []}

    def show(title: str, shell_line: str, result) -> None:
        out.append(f"$ {shell_line}")
        text = result.render()
        out.append(text)
        out.append("")
        doc["steps"].append({"step": title, "command": shell_line, "result": result.to_dict()})

    loads = [("oct-baseline", "rack-a.toml", ["oct-baseline.csv"]),
             ("nov-tuning", "rack-a.toml", ["nov-rack-a.csv"]),
             ("nov-tuning", "rack-b.toml", ["nov-rack-b.jsonl", "nov-rack-b-extra.jsonl"])]
    for campaign, layout, names in loads:
        res = _step(session, "load", files=[str(files / n) for n in names], campaign=campaign,
                    layout=str(files / layout), skip_bad=False, rejects=None, dry_run=False)
        if res.exit_status:
            raise BlockyardError("demo: a generated file was refused: " + "; ".join(res.errors()))
        show("load", f"blockyard load {' '.join('files/' + n for n in names)} --campaign {campaign} --layout files/{layout}", res)
    show("inventory", "blockyard inventory", _step(session, "inventory", kind=None, limit=None))
    _walk(session, show, root)
    out.append("next, try:")
    out.append(f"  blockyard shell {db}")
    out.append(f"  blockyard inventory solvers -w {db}")
    session.close()
    return Done("\n".join(out), doc)


def _walk(session: Session, show, root: Path) -> None:
    """The main job on the demo: coverage, the blocked test, the baseline comparison, where the runs
    vary and the allocation of the next campaign, the ledger.
    The versus step also catches the greedy build's timeouts on oversize loads: its failures part
    tests solved / not solved per instance and says, in a caution, which treatment fails more."""
    nov = "stacker@1.4 campaign=oct-baseline | solver=stacker campaign=nov-tuning"
    session.focus = nov
    session.metric = "pallets"
    show("peek", f'blockyard peek --slice "{nov}" --metric pallets',
         _step(session, "peek", slice=nov, metric="pallets", replicates=None, instances=None, failures=None, holes=None))
    common = dict(replicates=None, instances=None, failures=None, holes=None)
    bt = _step(session, "blocktest", slice=nov, metric="pallets", transform="none", design="auto", pairs=False, **common)
    show("blocktest", f'blockyard blocktest --slice "{nov}" --metric pallets', bt)
    vs = _step(session, "versus", baseline="stacker@1.4", slice=nov, metric="pallets", method="dunnett", adjust="holm",
               better=None, margin=None, confidence=0.95, **common)
    show("versus", f'blockyard versus stacker@1.4 --slice "{nov}" --metric pallets', vs)
    # the nightly question: did any November build get worse than 1.4 by more than 2 %?
    gd = _step(session, "guard", baseline="stacker@1.4", slice=nov, metric="pallets", margin="2%", confidence=0.95,
               markdown=None, **common)
    show("guard", f'blockyard guard stacker@1.4 --slice "{nov}" --metric pallets --margin 2%   '
         f'# exit status {gd.exit_status}', gd)
    # where the November runs vary, and what the next campaign should buy with its CPU hours
    tuning = "solver=stacker campaign=nov-tuning"
    nz = _step(session, "noise", slice=tuning, metric="pallets", method="auto", confidence=0.95, time_metric=None)
    show("noise", f'blockyard noise --slice "{tuning}" --metric pallets', nz)
    plan = dict(effect=1.0, delta=None, means=None, sd=None, sigma=None, from_id=None, blocks=None, power=0.8,
                alpha=0.05, comparisons=1, noise=str(nz.analysis_id), budget_hours=None, run_seconds=None,
                instance_seconds=0.0, group_seconds=0.0, max_groups=None, max_instances=None, more=None)
    show("plan", f"blockyard plan --noise {nz.analysis_id} --effect 1", _step(session, "plan", **plan))
    claim = "stacker 1.6 uses fewer pallets than the October baseline 1.4"
    show("keep", f'blockyard keep "{claim}" --analysis {vs.analysis_id} --tag demo',
         _step(session, "keep", claim=claim, analysis=vs.analysis_id, tag=["demo"]))
    show("recall", "blockyard recall pallets --tag demo",
         _step(session, "recall", what="pallets", tag=["demo"], solver=None, since=None, stale=False, limit=None))
    bad = "campaign=nov-tuning host=rack-b version=1.5"
    show("retract", f'blockyard retract --slice "{bad}" --reason "build 1.5 on rack-b mis-counted pallets"',
         _step(session, "retract", slice=bad, reason="build 1.5 on rack-b mis-counted pallets", undo=None))
    show("recheck", f"blockyard recheck {vs.analysis_id}", _step(session, "recheck", id=vs.analysis_id))
    report = root / "report.html"
    show("export", f"blockyard export {vs.analysis_id} --to {report}",
         _step(session, "export", id=vs.analysis_id, to=str(report)))


# --- the `demo` command --------------------------------------------------------------------------------------

def _demo_args(p):
    p.add_argument("folder", nargs="?", default=".", help="where to put the demo files and demo.db (default: here)")
    add_json(p)


@command("demo", "build a demo warehouse from generated campaign files and walk the main job",
         "blockyard demo /tmp/yard", needs_warehouse=False)
@args(_demo_args)
def cmd_demo(session: Session, a) -> Done:
    return run_demo(a.folder, json_mode=a.json)
