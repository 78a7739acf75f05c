"""`blockyard demo`: generate the invented campaign, load it, and walk the main job."""
from __future__ import annotations

import argparse
from pathlib import Path

from .commands import Done, REGISTRY
from .errors import BlockyardError
from .session import Session


def _step(session: Session, name: str, **kw):
    ns = argparse.Namespace(json=False, **kw)
    return REGISTRY[name].run(session, ns)


def run_demo(folder: str, json_mode: bool = False) -> Done:
    from .demo import generate
    from .store.connect import init_warehouse

    root = Path(folder).expanduser()
    root.mkdir(parents=True, exist_ok=True)
    db = root / "demo.db"
    for suffix in ("", "-wal", "-shm"):
        Path(str(db) + suffix).unlink(missing_ok=True)  # the demo's own file, rebuilt each time
    written = generate(root)
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
    walk = getattr(__import__("warehouse.walkthrough_steps", fromlist=["steps"]), "steps", None) if _has_steps() else None
    if walk:
        walk(session, show, root)
    out.append("next, try:")
    out.append(f"  blockyard shell {db}")
    out.append(f"  blockyard inventory solvers -w {db}")
    session.close()
    return Done("\n".join(out), doc)


def _has_steps() -> bool:
    import importlib.util

    return importlib.util.find_spec("warehouse.walkthrough_steps") is not None
