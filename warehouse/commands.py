"""Every command as one function over a Session: the CLI, the shell and notebooks call these.

A command's `run` returns a result object with `to_dict()` (the --json document) and `render()`
(the text a person reads). Arguments are declared once, for argparse; the shell reuses them.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import dataclass, field
from typing import Callable

from .errors import InputError, StorageError
from .session import Session


@dataclass
class Command:
    name: str
    summary: str
    example: str
    configure: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Session, argparse.Namespace], object]
    needs_warehouse: bool = True


REGISTRY: dict[str, Command] = {}


def command(name: str, summary: str, example: str, needs_warehouse: bool = True):
    def wrap(fn):
        def configure(p):
            fn.configure(p)
        REGISTRY[name] = Command(name, summary, example, fn.configure, fn, needs_warehouse)
        return fn
    return wrap


def args(configure):
    """Attach an argument declaration to a command function."""
    def wrap(fn):
        fn.configure = configure
        return fn
    return wrap


@dataclass
class Done:
    """A plain result: a message and a JSON document."""

    text: str
    doc: dict = field(default_factory=dict)
    exit_status: int = 0

    def to_dict(self) -> dict:
        return self.doc

    def render(self) -> str:
        return self.text


def add_json(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout instead of text")


def unknown_words(parser: argparse.ArgumentParser, extras: list[str]) -> str:
    """What a parser could not place, said in one line: the first mistyped option with the nearest
    real one ("--metirc: did you mean --metric?"). The CLI and the shell both say it this way."""
    from difflib import get_close_matches

    from .select.slices import brief

    known = sorted({s for action in parser._actions for s in action.option_strings if s.startswith("--")})
    for word in extras:
        name = word.split("=", 1)[0]
        if not name.startswith("-") or _is_number(name):
            continue
        # the names are compared without their dashes, which would make every pair look alike
        bare = {k.lstrip("-"): k for k in known}
        near = [bare[k] for k in get_close_matches(name.lstrip("-"), list(bare), n=2)]
        if near:
            return f"{brief(name)}: did you mean {' or '.join(near)}?"
        return f"{brief(name)}: no such option"
    return f"unexpected {'argument' if len(extras) == 1 else 'arguments'}: {brief(' '.join(extras))}"


def _is_number(word: str) -> bool:
    try:
        float(word)
    except ValueError:
        return False
    return True


# --- init, upgrade -----------------------------------------------------------------------------

def _init_args(p):
    add_json(p)


@command("init", "create a new warehouse (a SQLite file, or a PostgreSQL URL)",
         "blockyard init -w results.db", needs_warehouse=False)
@args(_init_args)
def cmd_init(session: Session, a) -> Done:
    from .store.connect import init_warehouse, shown as shown_location
    from .store.schema import SCHEMA_REVISION

    wh = init_warehouse(session.location)
    shown = wh.display
    wh.close()
    return Done(f"created warehouse {shown} (schema {SCHEMA_REVISION})\nnext: blockyard load FILE --campaign NAME -w {shown_location(session.where)}",
                {"warehouse": shown, "schema": SCHEMA_REVISION, "status": "created"})


@command("upgrade", "bring an older warehouse to this version's schema (copies the file aside first)",
         "blockyard upgrade -w results.db", needs_warehouse=False)
@args(_init_args)
def cmd_upgrade(session: Session, a) -> Done:
    from .store.connect import upgrade_warehouse
    from .store.schema import SCHEMA_REVISION

    wh, old, backup = upgrade_warehouse(session.location)
    shown = wh.display
    wh.close()
    if old == SCHEMA_REVISION:
        return Done(f"warehouse {shown} is already at schema {SCHEMA_REVISION}; nothing to do",
                    {"warehouse": shown, "from": old, "to": SCHEMA_REVISION, "backup": None, "status": "current"})
    where = f"; the old file is kept as {backup}" if backup else ""
    return Done(f"upgraded warehouse {shown} from schema {old} to {SCHEMA_REVISION}{where}",
                {"warehouse": shown, "from": old, "to": SCHEMA_REVISION, "backup": backup, "status": "upgraded"})


# --- load --------------------------------------------------------------------------------------

def _load_args(p):
    p.add_argument("files", nargs="+", metavar="FILE", help="result files: .csv .tsv .jsonl .parquet, optionally .gz")
    p.add_argument("--campaign", required=True, help="campaign the runs belong to (created if new)")
    p.add_argument("--layout", metavar="L.toml", help="layout file mapping this source's columns (docs/loading.md)")
    p.add_argument("--skip-bad", action="store_true", help="load the good rows; write rejected ones with a reason")
    p.add_argument("--rejects", metavar="FILE", help="where --skip-bad writes rejected rows (default: beside the source)")
    p.add_argument("--dry-run", action="store_true", help="read and check everything, print the mapping, store nothing")
    p.add_argument("--again", action="store_true",
                   help="load a file loaded before whose earlier import is wholly retracted (e.g. with a corrected layout)")
    add_json(p)


@dataclass
class LoadResult:
    reports: list
    dry_run: bool
    created: str | None = None  # the warehouse this load created (a SQLite path that held no file)
    unmade: str | None = None  # a dry run's warehouse path that holds no file yet (checked against an empty one)

    @property
    def exit_status(self) -> int:
        return 2 if any(r.status == "refused" for r in self.reports) else 0

    def to_dict(self) -> dict:
        doc = {"imports": [r.to_dict() for r in self.reports]}
        if self.created:
            doc["created_warehouse"] = self.created
        return doc

    def errors(self) -> list[str]:
        return [r.message for r in self.reports if r.status == "refused"]

    def render(self) -> str:
        from .present.loading import render_load

        return render_load(self)


@command("load", "read result files into a campaign, all or nothing per file",
         "blockyard load runs-nov.csv --campaign nov-tuning --layout rack-b.toml")
@args(_load_args)
def cmd_load(session: Session, a) -> LoadResult:
    from .ingest.layout import read_layout
    from .ingest.loader import check_campaign

    # every option first: a mistake in one is told before any file is read or compared with the
    # files loaded before (a file loaded already is no reason to keep quiet about a broken layout)
    if a.rejects and len(a.files) > 1:
        raise InputError("--rejects names one file; with several sources leave it out (each gets its own beside it)")
    check_campaign(a.campaign)
    layout = read_layout(a.layout)
    missing = _missing_sqlite_warehouse(session)
    if missing is None:
        wh = session.warehouse()
        if wh.read_only and not a.dry_run:
            raise StorageError(f"cannot load into warehouse {wh.display}: it is read-only here ({wh.read_only}); "
                               "nothing was stored")
        return LoadResult(_load_each(wh, a, layout), a.dry_run)
    if a.dry_run:  # stores nothing, so makes no warehouse either: checks against an empty one aside
        import tempfile
        from pathlib import Path

        from .store.connect import init_warehouse

        with tempfile.TemporaryDirectory(prefix="blockyard-dry-run-") as aside:
            wh = init_warehouse(str(Path(aside) / "empty.db"))
            try:
                return LoadResult(_load_each(wh, a, layout), True, unmade=missing)
            finally:
                wh.close()
    from .store.connect import init_warehouse

    try:
        made = init_warehouse(missing)  # as `blockyard init` would
        created = made.display
        made.close()
    except StorageError:
        if not _missing_sqlite_warehouse(session):  # another load made it meanwhile: use it
            created = None
        else:
            raise
    return LoadResult(_load_each(session.warehouse(), a, layout), a.dry_run, created=created)


def _missing_sqlite_warehouse(session: Session) -> str | None:
    """The SQLite path the load goes to when no file is there yet, for the load to create the
    warehouse in; None when one is there (or it is a server: a database there is made by `init`,
    whose own message says so). A path in a folder that does not exist is refused here."""
    from pathlib import Path

    where = session.where
    if "://" in where:  # a server URL (store.connect reads locations the same way)
        return None
    path = Path(where).expanduser()
    if path.exists() or path.is_symlink():
        return None
    if not path.parent.is_dir():
        raise StorageError(f"no folder {path.parent} for warehouse {where}; create the folder first, "
                           "or give -w a path in a folder that exists")
    return where


def _load_each(wh, a, layout) -> list:
    """Each file in turn; a refused one is reported and does not stop the others."""
    from .errors import BlockyardError
    from .ingest.loader import FileReport, load_file

    reports = []
    for f in a.files:
        progress = _progress_bar(f) if (sys.stderr.isatty() and not getattr(a, "json", False)) else None
        try:
            with progress or _Null() as bar:
                rep = load_file(wh, f, a.campaign, layout, skip_bad=a.skip_bad, dry_run=a.dry_run,
                                rejects=a.rejects, progress=bar.update if progress else None,
                                again=getattr(a, "again", False))  # (the demo's own steps leave it out)
        except BlockyardError as exc:
            rep = FileReport(file=f, status="refused", campaign=a.campaign, message=str(exc))
        reports.append(rep)
    return reports


class _Null:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def _progress_bar(name: str):
    from .present.progress import FileProgress

    return FileProgress(name)


# --- inventory ---------------------------------------------------------------------------------

def _inventory_args(p):
    from .inventory import KINDS

    p.add_argument("kind", nargs="?", choices=_Listings(KINDS), metavar="LISTING",
                   help=f"list one kind of thing: {', '.join(KINDS)} (default: counts only)")
    p.add_argument("--limit", type=int, help="show at most this many rows")
    add_json(p)


class _Listings(list):
    """The listings, for help and shell completion; argparse takes any word, so that inventory()
    answers a wrong one in its own words (with the nearest listing)."""

    def __contains__(self, item) -> bool:
        return True


@dataclass
class InventoryResult:
    inv: object

    def to_dict(self) -> dict:
        return self.inv.to_dict()

    def render(self) -> str:
        from .present.loading import render_inventory

        return render_inventory(self.inv)


@command("inventory", "what the warehouse holds: counts, or a listing of one kind",
         "blockyard inventory solvers")
@args(_inventory_args)
def cmd_inventory(session: Session, a) -> InventoryResult:
    from .inventory import inventory

    return InventoryResult(inventory(session.warehouse(), a.kind, a.limit))


# --- demo --------------------------------------------------------------------------------------

def _demo_args(p):
    p.add_argument("folder", nargs="?", default=".", help="where to put the demo files and demo.db (default: here)")
    add_json(p)


@command("demo", "build a demo warehouse from generated campaign files and walk the main job",
         "blockyard demo /tmp/yard", needs_warehouse=False)
@args(_demo_args)
def cmd_demo(session: Session, a) -> Done:
    from .walkthrough import run_demo

    return run_demo(a.folder, json_mode=a.json)


# --- resident ----------------------------------------------------------------------------------

def _resident_args(p):
    from .resident import DEFAULT_IDLE_MINUTES, FORWARDED

    p.add_argument("action", choices=["start", "stop", "status", "serve"],
                   help="start one in the background, stop it, say whether one runs, or serve in the foreground")
    p.add_argument("--idle", type=float, default=DEFAULT_IDLE_MINUTES, metavar="MINUTES",
                   help=f"stop after this many minutes without a command (default {DEFAULT_IDLE_MINUTES:g})")
    p.epilog = ("While a resident runs, blockyard hands it these commands and prints what it sends back: "
                f"{', '.join(sorted(FORWARDED))}. BLOCKYARD_RESIDENT=off keeps a command out of it. "
                "example: blockyard resident start --idle 60")
    add_json(p)


@command("resident", "keep one warm Blockyard process that runs the analysis commands without start-up time",
         "blockyard resident start --idle 60", needs_warehouse=False)
@args(_resident_args)
def cmd_resident(session: Session, a) -> Done:
    from . import resident

    if not 0 < a.idle < float("inf"):  # (NaN fails the comparison too)
        raise InputError(f"--idle {a.idle:g}: give a number of minutes above 0, e.g. 30")
    if a.action == "serve":
        code = resident.serve(a.idle)
        return Done("", {"stopped": True}, exit_status=code)
    if a.action == "start":
        try:
            doc = resident.start(a.idle)
        except OSError as exc:
            raise StorageError(f"cannot start a resident process: {exc}") from None
        if doc.get("started"):
            text = (f"resident started (process {doc['pid']}, stops after {doc['idle_minutes']:g} idle minutes); "
                    "blockyard now hands it the analysis commands; stop it with: blockyard resident stop")
        else:
            text = f"a resident is running already (process {doc['pid']}, {_served(doc['served'])})"
        return Done(text, doc)
    if a.action == "stop":
        stopped = resident.stop()
        return Done("resident stopped" if stopped else "no resident was running", {"stopped": stopped})
    doc = resident.status()
    if doc.get("running"):
        since = time.strftime("%Y-%m-%d %H:%M", time.gmtime(doc["since"]))
        text = (f"resident running: process {doc['pid']} since {since} UTC, {_served(doc['served'])}, "
                f"stops after {doc['idle_minutes']:g} idle minutes; socket {doc['socket']}")
    else:
        text = "no resident running; start one with: blockyard resident start"
    return Done(text, doc)


def _served(n: int) -> str:
    return f"{n} {'command' if n == 1 else 'commands'} served"
