"""Loading one result file into the warehouse: one file, one transaction, all or nothing.

The steps, in the order a file meets them (the module that does each in brackets):

1. The first pass (scan.py; early.py hands it over when `blockyard load` ran it while the
   libraries were imported): the format from the name, the hash, the lines and quotes.
2. Bytes loaded before (reload.py): a duplicate is reported, not loaded; `--again` loads it
   in place of an import whose runs are all retracted.
3. Read in chunks (sources.py, or the parse early.py started) and check every value
   (checks.py: columns mapped to fields and metrics; names, numbers, statuses and times checked
   by Arrow kernels; bad rows refused, or set aside with `--skip-bad`). Reading and checking run
   in a helper thread (devices.Prefetch) and start before the write transaction opens.
4. In one write transaction: the import's row; each chunk's names to ids (names.py); its runs
   proved new, or checked against a key index (runkey.py); its runs written (write.py); its
   cells summed by a second helper thread (cellsums.py).
5. The summaries: the cell rows (cellsums.py on SQLite, store/cells.py otherwise) and the block
   rows (store/blocks.py); the import's counts and id and time ranges; the rejected rows' file
   (write.py). Then the commit.

Nothing is stored when a step refuses. Two things start a load over, also with nothing stored:
a quick SQLite load that cannot prove its runs new (runkey.StartOver: again, the exact way) and
a CSV record longer than the reader's block (sources.LongRecord: again, in a larger block).
The devices around a load (devices.py, store/bulk.py) change how fast, never what.
"""
from __future__ import annotations

import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
from sqlalchemy import func, insert, select, update
from sqlalchemy.exc import IntegrityError, OperationalError

from ..version import __version__
from ..errors import InputError, StorageError
from ..store import partitions
from ..store import schema as S
from ..store.bulk import BULK_MIN_ROWS, BulkJournal
from ..store.connect import Warehouse, hold_runs_for_load, take_run_ids
from . import early, reload, runkey
from .cellsums import Summing, run_statements
from .checks import FileLoad, Rows, checked
from .devices import CollectorPaused, ForeignKeysOff, PandasNotForArrow, Prefetch, SmallPages
from .layout import Layout
from .names import ChunkIds, Dimensions, campaign_id, check_campaign
from .scan import SourceInfo
from .sources import BLOCK_BYTES, LongRecord, block_for, read_delimited, read_header, read_jsonl, read_parquet
from .write import Writer, report_conflicts, write_rejects


@dataclass
class FileReport:
    file: str
    status: str  # loaded | duplicate | refused | checked (dry run)
    rows_read: int = 0
    rows_loaded: int = 0
    rows_rejected: int = 0
    rows_skipped: int = 0
    campaign: str = ""
    import_id: int | None = None
    message: str = ""
    warnings: list[str] = field(default_factory=list)
    rejects_file: str | None = None
    mapping: dict[str, str] = field(default_factory=dict)
    metrics: dict[str, str] = field(default_factory=dict)
    ignored: list[str] = field(default_factory=list)
    preview: list[dict] = field(default_factory=list)
    replaces: int | None = None  # the wholly retracted import this load replaced (--again)

    def to_dict(self) -> dict:
        d = {"file": self.file, "status": self.status, "rows_read": self.rows_read,
             "rows_loaded": self.rows_loaded, "rows_rejected": self.rows_rejected,
             "rows_skipped": self.rows_skipped, "campaign": self.campaign,
             "import_id": self.import_id, "message": self.message, "warnings": self.warnings}
        if self.rejects_file:
            d["rejects_file"] = self.rejects_file
        if self.replaces is not None:
            d["replaces"] = self.replaces
        if self.status == "checked":
            d.update(mapping=self.mapping, metrics=self.metrics, ignored=self.ignored, preview=self.preview)
        return d


def load_file(wh: Warehouse, path: str | Path, campaign: str, layout: Layout | None = None, *,
              skip_bad: bool = False, dry_run: bool = False, rejects: str | Path | None = None,
              progress: Callable[[int, int], None] | None = None, again: bool = False) -> FileReport:
    """Load one result file into `campaign`; refuse it whole, with one line saying why, on bad input.

    `again`: load bytes loaded before, when every earlier import of them is wholly retracted, as
    a new import that names the one it replaces (`load --again`)."""
    with PandasNotForArrow(), CollectorPaused(), SmallPages():
        return _load_file(wh, path, campaign, layout, skip_bad=skip_bad, dry_run=dry_run, rejects=rejects,
                          progress=progress, again=again)


def _load_file(wh: Warehouse, path: str | Path, campaign: str, layout: Layout | None, *,
               skip_bad: bool, dry_run: bool, rejects: str | Path | None,
               progress: Callable[[int, int], None] | None, again: bool) -> FileReport:
    layout = layout or Layout()
    check_campaign(campaign)  # every option is checked before the file is compared with the stored ones
    shown = str(path)
    p = Path(path)
    info = early.first_pass_of(p, shown)  # started early by the command line when it could
    earlier = reload.earlier_imports(wh, info.sha256)
    if earlier and not again:
        head = earlier[-1]
        return FileReport(file=shown, status="duplicate", campaign=head.campaign, import_id=head.id,
                          message=reload.duplicate_message(earlier))
    replaces = reload.replaced(wh, shown, earlier)
    block = BLOCK_BYTES
    deadlocks = 0
    try:
        while True:
            try:
                report = _attempts(wh, info, p, campaign, layout, skip_bad, dry_run, rejects, progress,
                                   replaces=replaces, block=block)
                break
            except LongRecord as exc:  # nothing was stored: read it all again in a larger block
                block = block_for(info, exc.block)
            except Exception as exc:
                # a server: two loads of other campaigns each waited for the other (one adding a
                # metric's column while the other waited to add a name) and the server rolled this
                # one back; nothing was stored, so it starts again (PostgreSQL documentation,
                # "Deadlocks": the transaction is retried)
                if _sqlstate(exc) != "40P01" or deadlocks >= DEADLOCK_RETRIES:
                    raise
                deadlocks += 1
    except OperationalError as exc:
        raise StorageError(f"cannot write to warehouse {wh.display}: {_db_reason(exc)}; nothing from {shown} was stored") from None
    except IntegrityError as exc:
        if "sha256" in str(exc.orig) or "imports" in str(exc.orig):
            what = "loaded these bytes again" if replaces is not None else "loaded the same bytes"
            return FileReport(file=shown, status="duplicate", campaign=campaign,
                              message=f"another process {what} just now; nothing to do")
        raise StorageError(f"warehouse {wh.display} refused a write: {_db_reason(exc)}; nothing from {shown} was stored") from None
    except Exception as exc:  # the driver's own cursor (bulk writes) raises its errors unwrapped
        if not _is_driver_error(exc):
            raise
        raise StorageError(f"cannot write to warehouse {wh.display}: {_db_reason(exc)}; nothing from {shown} was stored") from None
    if deadlocks:
        report.warnings.append(f"the server rolled this load back {deadlocks} time{'s' if deadlocks > 1 else ''} to "
                               "end a deadlock with another load, and it was started again from the file")
    if again and not earlier:
        report.warnings.append("--again: these bytes were not loaded before; loaded as any new file")
    # No ANALYZE of a SQLite warehouse after a load: statistics sampled from the first rows of an
    # index (analysis_limit) told the planner a campaign holds a thousand runs and sent date
    # slices through the campaign index instead of their id ranges, and full statistics cost a
    # pass over every index on each nightly load. The planner's own estimates serve every slice
    # the benchmarks time. (A server's summaries are analyzed after a large load: _write.)
    return report


def _attempts(wh: Warehouse, info: SourceInfo, p: Path, campaign: str, layout: Layout, skip_bad: bool,
              dry_run: bool, rejects, progress, **how) -> FileReport:
    try:
        return _load(wh, info, p, campaign, layout, skip_bad, dry_run, rejects, progress, allow_bulk=True, **how)
    except runkey.StartOver:
        return _load(wh, info, p, campaign, layout, skip_bad, dry_run, rejects, progress, allow_bulk=False, **how)


def _load(wh: Warehouse, info: SourceInfo, p: Path, campaign: str, layout: Layout, skip_bad: bool,
          dry_run: bool, rejects, progress, allow_bulk: bool, replaces: int | None = None,
          block: int = BLOCK_BYTES) -> FileReport:
    """Steps 3 to 5: the reading and checks start, then the write transaction takes their chunks."""
    report = FileReport(file=info.name, status="loaded", campaign=campaign, replaces=replaces)
    fl = FileLoad(info, layout, skip_bad, block)
    fl.replaces = replaces
    total = max(_records_at_most(info), 1)
    with wh.engine.connect() as conn:  # the metrics known already (they are not guessed at)
        fl.known_metrics = {r[0] for r in conn.execute(select(S.metrics.c.name))}
    # The reading starts now, in a helper thread where it can, while the write transaction opens
    chunks = checked(fl, _readers(fl))
    if info.fmt != "jsonl":  # (the JSON Lines parse holds Python's lock: nothing to overlap)
        chunks = Prefetch(chunks)
    summing = Summing()
    try:
        return _write(wh, p, campaign, layout, fl, total, chunks, summing, report, dry_run, rejects,
                      progress, allow_bulk)
    finally:
        summing.close()
        if isinstance(chunks, Prefetch):
            chunks.close()


def _readers(fl: FileLoad):
    """Step 3's reader: the parse started early for this very first pass, when there is one."""
    info = fl.info
    if info.delimited:
        parsed = early.take_early_read(info)
        if parsed is not None and not fl.skip_bad and fl.block_bytes == BLOCK_BYTES:
            parsed.ready.wait()
            if parsed.error is not None:
                raise parsed.error
            fl.header, fl.header_line = parsed.header, parsed.header_line
            fl.check_header(fl.header)
            return parsed.chunks(fl.bad_row)
        fl.header, fl.header_line = read_header(info)
        fl.check_header(fl.header)
        return read_delimited(info, fl.header, fl.header_line, fl.bad_row, fl.block_bytes)
    if info.fmt == "jsonl":
        return read_jsonl(info)
    return read_parquet(info)


@dataclass
class _Import:
    """The import being written: its ids, the next run id, and what has gone in so far."""

    conn: object
    campaign_id: int
    import_id: int
    dims: Dimensions
    key: runkey.RunKey
    next_id: int
    first_id: int
    partition: str | None = None  # PostgreSQL: the campaign's new partition, attached at the end
    cells: str | None = None  # PostgreSQL: the new campaign's table of cell summaries, attached at the end
    cell_rows: int | None = None  # PostgreSQL: the cell rows written (None: not counted)
    id_end: int | None = None  # PostgreSQL: one past the block of run ids the load took
    writer: Writer | None = None
    read: int = 0
    loaded: int = 0
    skipped: int = 0
    first_fin: int | None = None  # the import's time range (imports.first_finished, last_finished)
    last_fin: int | None = None


def _write(wh: Warehouse, p: Path, campaign: str, layout: Layout, fl: FileLoad, total: int, chunks,
           summing: Summing, report: FileReport, dry_run: bool, rejects, progress, allow_bulk: bool) -> FileReport:
    """Steps 4 and 5, in the write transaction."""
    shown = fl.name
    writes_sqlite = wh.is_sqlite and not dry_run
    bulk_wanted = allow_bulk and writes_sqlite and total >= BULK_MIN_ROWS
    with wh.write() as conn, ForeignKeysOff(conn, wh.is_sqlite), BulkJournal(conn, writes_sqlite, bulk_wanted, total):
        with conn.begin() as trans:
            imp = _open_import(conn, wh, p, campaign, layout, fl, allow_bulk and not dry_run, total)
            try:
                for raw, rows, n_read in chunks:
                    imp.read += n_read
                    if not report.preview:
                        report.preview = rows.preview()
                    if len(rows) == 0:
                        continue
                    _write_chunk(imp, wh, layout, fl, raw, rows, summing, report)
                    if progress:
                        progress(min(imp.read, total), total)
                if imp.writer is not None:
                    imp.writer.wait()  # the last chunk is in (a server: sent by a helper thread)
            finally:
                if imp.writer is not None:
                    imp.writer.close()
            _refuse_empty(fl, imp.read)
            # the helper merges the cell sums and checks the run hashes while this thread checks the numbering
            if wh.is_sqlite and not imp.skipped:
                summing.finish(imp.campaign_id, imp.import_id)
            else:
                summing.finish()
            if wh.is_sqlite and imp.key.quick and imp.loaded:
                last = conn.execute(select(func.max(S.runs.c.id))).scalar()
                if last != imp.next_id - 1:  # SQLite numbered the rows otherwise than the load did
                    raise StorageError(f"warehouse {wh.display} numbered the runs of {shown} up to {last}, "
                                       f"not {imp.next_id - 1}; nothing from {shown} was stored")
            rejected = len(fl.rejects)
            imp.read += fl.ragged
            if imp.skipped > 3:
                fl.warnings.append(f"{imp.skipped} runs in all were already in the campaign and were skipped")
            # the id and time range may be wider than the runs that went in (skipped ones), never narrower
            loaded = imp.loaded
            conn.execute(update(S.imports).where(S.imports.c.id == imp.import_id).values(
                rows_read=imp.read, rows_loaded=loaded, rows_rejected=rejected, rows_skipped=imp.skipped,
                first_run_id=imp.first_id if loaded else None, last_run_id=imp.next_id - 1 if loaded else None,
                first_finished=imp.first_fin if loaded else None, last_finished=imp.last_fin if loaded else None))
            _write_summaries(imp, wh, summing)
            report.rows_read, report.rows_loaded = imp.read, loaded
            report.rows_rejected, report.rows_skipped = rejected, imp.skipped
            report.import_id = imp.import_id
            report.mapping = dict(fl.mapping)
            report.ignored = list(fl.ignored)
            report.warnings = fl.warnings
            if fl.undecided:
                report.warnings.append(f"columns with no values were not read: {', '.join(sorted(fl.undecided))}")
            if dry_run:
                report.status = "checked"
                report.import_id = None
                trans.rollback()
                instead = f", in place of import {fl.replaces}" if fl.replaces is not None else ""
                report.message = (f"would load {loaded} {'run' if loaded == 1 else 'runs'} into campaign {campaign}"
                                  f"{instead}; nothing was stored")
                return report
            imp.key.close()
            if fl.rejects:
                target = Path(rejects) if rejects else p.with_name(p.name + ".rejects.csv")
                write_rejects(target, fl.rejects, shown, fl.header)
                report.rejects_file = str(target)
    if not wh.is_sqlite and loaded:
        from ..store import cells

        cells.refresh_statistics(wh.engine, imp.campaign_id, imp.import_id, imp.cell_rows)
    parts = [f"{loaded} {'run' if loaded == 1 else 'runs'} loaded into campaign {campaign}"]
    if fl.replaces is not None:
        parts.append(f"in place of import {fl.replaces} (wholly retracted)")
    if report.rows_rejected:
        parts.append(f"{report.rows_rejected} rejected (see {report.rejects_file})")
    if imp.skipped:
        parts.append(f"{imp.skipped} already stored, skipped")
    report.message = ", ".join(parts)
    return report


def _open_import(conn, wh: Warehouse, p: Path, campaign: str, layout: Layout, fl: FileLoad, quick_allowed: bool,
                 total: int) -> _Import:
    """The import's row, the names known already, and the way its runs are kept once per campaign."""
    if wh.dialect == "postgresql":
        hold_runs_for_load(conn, campaign)
    cid = campaign_id(conn, campaign)
    fl.chain = reload.replaced_chain(conn, fl.replaces)
    import_id = conn.execute(insert(S.imports).values(
        campaign_id=cid, file_name=p.name, sha256=fl.info.sha256, layout=layout.text,
        replaces_import_id=fl.replaces,
        rows_read=0, rows_loaded=0, rows_rejected=0, rows_skipped=0,
        loaded_at=int(time.time()), tool_version=__version__)).inserted_primary_key[0]
    dims = Dimensions(conn)
    if wh.is_sqlite:  # one writer at a time: the ids go on from the largest
        next_id = (conn.execute(select(func.max(S.runs.c.id))).scalar() or 0) + 1
    else:  # loads of other campaigns write meanwhile: a block of ids for every record the file may hold
        next_id = take_run_ids(conn, total)
    fresh = fresh_cells = None
    try:
        if partitions.partitioned(conn):
            if quick_allowed:
                fresh = partitions.fresh(conn, cid)  # a new campaign's: filled with no key, attached at the end
            if fresh is None:  # a campaign with runs: through its partition's run key, made now if it has none
                partitions.ensure(conn, cid)
                partitions.ensure_cells(conn, cid)
                partitions.keyed(conn, cid)
            else:  # its cell summaries too: filled with no index, indexed and attached at the end
                fresh_cells = partitions.fresh_cells(conn, cid)
        key = runkey.RunKey(conn, wh.is_sqlite, cid, fl.chain, quick_allowed, total, fresh=fresh is not None)
    except IntegrityError:  # the campaign's key index could not be made: two live runs share a key
        raise StorageError(f"campaign {campaign} already holds two live runs under one key (solver, instance, "
                           "seed and replicate), put in outside Blockyard, so its runs cannot be kept once each; "
                           f"nothing from {fl.name} was stored; blockyard verify names them") from None
    imp = _Import(conn, cid, import_id, dims, key, next_id, next_id, partition=fresh, cells=fresh_cells,
                  id_end=None if wh.is_sqlite else next_id + total)
    dims.before_sql = lambda: imp.writer.wait() if imp.writer is not None else None
    return imp


def _write_chunk(imp: _Import, wh: Warehouse, layout: Layout, fl: FileLoad, raw, rows: Rows, summing: Summing,
                 report: FileReport) -> None:
    """One checked chunk: names to ids, the runs proved new and written, the cells summed."""
    metric_slots = imp.dims.metric_slots(rows.metrics, layout, fl.name, report.metrics)
    slots = sorted(metric_slots.values())
    if imp.writer is None or imp.writer.slots != slots:
        if imp.writer is not None:
            imp.writer.wait()
        imp.writer = Writer(imp.conn, wh.dialect, slots, imp.campaign_id, imp.import_id, numbered=imp.key.quick,
                            chain=fl.chain, into=imp.partition)
    got: ChunkIds = imp.dims.resolve(rows.keys, fl.warnings)
    m = len(rows)
    if imp.id_end is not None and imp.next_id + m > imp.id_end:  # (a server: never seen; the ids taken ran out)
        raise StorageError(f"{fl.name}: more records than the first pass counted ({imp.id_end - imp.first_id}); "
                           "nothing from it was stored")
    ids = np.arange(imp.next_id, imp.next_id + m, dtype=np.int64)
    imp.next_id += m
    imp.key.check(got.solver, got.instance, rows.seed, rows.replicate, summing)
    if rows.has_finished.any():
        times = rows.finished[rows.has_finished]
        lo, hi = int(times.min()), int(times.max())
        imp.first_fin = lo if imp.first_fin is None else min(imp.first_fin, lo)
        imp.last_fin = hi if imp.last_fin is None else max(imp.last_fin, hi)
    metric_of_slot = {s: k for k, s in metric_slots.items()}
    free = imp.key.free(got.solver, got.instance, rows.seed, rows.replicate)
    if free is None:
        imp.writer.write(ids, rows, got.solver, got.instance, got.host, got.has_host, metric_of_slot)
    elif free.any():  # the rows a retracted run holds the key of stay out (counted below)
        imp.writer.write(ids[free], rows.take(free), got.solver[free], got.instance[free], got.host[free],
                         got.has_host[free], metric_of_slot)
    summing.add_reduced(rows.cells, base=int(ids[0]), key_maps=got.maps, slot_of=metric_slots)
    if imp.key.quick:
        imp.loaded += m  # no key to collide on: the file's runs are checked at its end
        return
    count = imp.conn.execute(select(func.count()).select_from(S.runs).where(
        S.runs.c.id.between(int(ids[0]), int(ids[-1])))).scalar()
    if count != m:
        got_in, sk = report_conflicts(imp.conn, fl, rows, raw, ids, got.solver, got.instance, imp.campaign_id,
                                      imp.import_id)
        imp.loaded += got_in
        imp.skipped += sk
    else:
        imp.loaded += m


def _refuse_empty(fl: FileLoad, read: int) -> None:
    """A file with no runs, or no metric, is refused whole."""
    shown = fl.name
    if read == 0 and not fl.rejects:
        if fl.info.delimited:
            raise InputError(f"{shown}: the file has a header but no data rows")
        raise InputError(f"{shown}: the file holds no records")
    if not fl.metric_cols and read:
        texty = [c for c in fl.guessed_text]
        why = (f"; {', '.join(texty)} {'holds' if len(texty) == 1 else 'hold'} text, not numbers "
               "(name a metric under [metrics] in a layout to have its values checked)") if texty else ""
        raise InputError(
            f"{shown}: no metric columns found (columns: {', '.join(fl.header or list(fl.mapping) + fl.ignored)}){why}; "
            "a metric is a numeric column other than the run fields"
        )


def _write_summaries(imp: _Import, wh: Warehouse, summing: Summing) -> None:
    """Step 5: the cell rows and the block rows of the import, from the sums made as it was written."""
    from ..store import blocks

    conn = imp.conn
    if imp.skipped:  # some rows did not go in: sum the cells from what was stored
        from ..store import cells

        summing.result()
        if imp.partition is not None:  # (never seen: nothing refuses a run of a new campaign's table)
            partitions.attach(conn, imp.campaign_id)
        if imp.cells is not None:
            partitions.attach_cells(conn, imp.campaign_id)
        cells.from_runs(conn, imp.import_id, imp.first_id, imp.next_id - 1)
        blocks.rebuild(conn, [imp.import_id])
        return
    if wh.is_sqlite:
        # the helper merges each slot's sums as its cell rows are wanted, then checks
        # the run hashes while the last parts are written
        run_statements(conn.connection.driver_connection, summing.parts())
        imp.key.proved(summing)  # (known once the parts are all handed over)
        summaries = summing.result()
    else:
        from ..store import cells
        from .write import Sender

        # A new campaign's runs table becomes its partition now (the block-range index on id
        # built by reading it, the retractions reference checked) while this thread waits for
        # the run hashes' verdict and makes the summaries' rows (-0.1 s of a 510,000-run load).
        # Should both fail, the verdict's StartOver is the one raised, after the attach's end.
        attaching = None
        if imp.partition is not None:
            attaching = Sender(conn.connection.driver_connection)
            attaching.execute(partitions.attach_sql(imp.campaign_id))
        try:
            summaries = summing.result()
            for _ in summing.parts():  # (none without ids: this waits for the run hashes' verdict)
                pass
            imp.key.proved(summing)
            payload = summaries.copy_payload(imp.campaign_id, imp.import_id)
            imp.cell_rows = summaries.count()
            group_of = {iid: key[0] for key, iid in imp.dims.instances.items()}
            block_rows = blocks.from_sums(summaries, imp.campaign_id, imp.import_id, group_of)
        finally:
            if attaching is not None:
                attaching.close()
        if attaching is not None:
            attaching.wait()
        cells.copy_binary(conn, payload, imp.cells or "cell_stats")
        if imp.cells is not None:  # its three indexes built by sorting, then attached
            partitions.attach_cells(conn, imp.campaign_id)
        blocks.write(conn, block_rows)
        return
    group_of = {iid: key[0] for key, iid in imp.dims.instances.items()}
    blocks.write(conn, blocks.from_sums(summaries, imp.campaign_id, imp.import_id, group_of))


DEADLOCK_RETRIES = 3


def _records_at_most(info: SourceInfo) -> int:
    """The most records the file can hold: its lines (less the header), or a Parquet file's row
    count from its footer (the progress bar's total; on a server, the run ids the load takes)."""
    if info.fmt != "parquet":
        return info.lines - (1 if info.delimited else 0)
    import pyarrow.parquet as pq

    try:
        return pq.ParquetFile(str(info.path)).metadata.num_rows
    except Exception:  # a damaged file: the reader says so in its own words
        return 0


def _sqlstate(exc: BaseException) -> str | None:
    return getattr(getattr(exc, "orig", exc), "sqlstate", None)


def _is_driver_error(exc: BaseException) -> bool:
    """sqlite3's errors, and psycopg's once a server was used (psycopg is not imported for this)."""
    import sys

    psycopg = sys.modules.get("psycopg")
    return isinstance(exc, sqlite3.Error) or (psycopg is not None and isinstance(exc, psycopg.Error))


def _db_reason(exc: Exception) -> str:
    orig = getattr(exc, "orig", exc)
    return str(orig).strip().splitlines()[0]
