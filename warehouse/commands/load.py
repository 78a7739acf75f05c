"""Reading result files into a campaign: load."""
from __future__ import annotations

import sys
from dataclasses import dataclass

from ..errors import InputError, StorageError
from .registry import add_json, args, command
from .session import Session
from ..shown import Shown


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
class LoadResult(Shown):
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
        from ..present.loading import render_load

        return render_load(self)


@command("load", "read result files into a campaign, all or nothing per file",
         "blockyard load runs-nov.csv --campaign nov-tuning --layout rack-b.toml")
@args(_load_args)
def cmd_load(session: Session, a) -> LoadResult:
    from ..ingest.layout import read_layout
    from ..ingest.names import check_campaign

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
            named = ", ".join(a.files[:3]) + (f" and {len(a.files) - 3} more" if len(a.files) > 3 else "")
            raise StorageError(f"cannot load {named} into warehouse {wh.display}: it is read-only here "
                               f"({wh.read_only}); nothing was stored")
        _refuse_damaged(wh)
        return LoadResult(_load_each(wh, a, layout), a.dry_run)
    if a.dry_run:  # stores nothing, so makes no warehouse either: checks against an empty one aside
        import tempfile
        from pathlib import Path

        from ..store.connect import init_warehouse

        with tempfile.TemporaryDirectory(prefix="blockyard-dry-run-") as aside:
            wh = init_warehouse(str(Path(aside) / "empty.db"))
            try:
                return LoadResult(_load_each(wh, a, layout), True, unmade=missing)
            finally:
                wh.close()
    from ..store.connect import init_warehouse

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


QUICK_CHECK_MAX_BYTES = 1 << 30  # SQLite's quick check reads every page: about 0.1 s per 100 MB from cache


def _refuse_damaged(wh) -> None:
    """A load adds to a SQLite file only when SQLite's own quick check passes: runs written into a
    damaged file could be lost with it, and its other pages may already be wrong. Files over 1 GiB
    skip the check (it would cost seconds on every load; `blockyard verify` runs the full one)."""
    if wh.path is None or not wh.path.exists() or wh.path.stat().st_size > QUICK_CHECK_MAX_BYTES:
        return
    import sqlite3

    try:
        con = sqlite3.connect(f"file:{wh.path}?mode=ro", uri=True)
        try:
            found = [r[0] for r in con.execute("PRAGMA quick_check(3)")]
        finally:
            con.close()
    except sqlite3.DatabaseError as exc:
        found = [str(exc)]
    if found != ["ok"]:
        raise StorageError(f"warehouse {wh.display} fails SQLite's quick check ({'; '.join(found)[:200]}); nothing "
                           "was loaded; run blockyard verify, and restore the file from a backup")


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
    from ..errors import BlockyardError
    from ..ingest.load import FileReport, load_file

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
    from ..present.progress import FileProgress

    return FileProgress(name)
