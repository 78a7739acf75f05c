"""plot and export: figures of an analysis, and a stored analysis as a self-contained report."""
from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

from .analyse import add_slice, metric_of, settings_of, slice_of
from .registry import add_json, args, command
from ..errors import InputError
from ..collapse.settings import Collapse
from .session import Session
from ..shown import Shown

KINDS = ("profile", "qq", "residuals", "differences", "performance", "solved")
REPORT_FORMATS = {".html": "html", ".md": "markdown"}


def _analysis_id(text, where: str = "analysis") -> int | None:
    from ..ledger import parse_id

    return None if text is None else parse_id(text, where)


def _stored(session: Session, analysis_id: int):
    from .. import ledger

    return ledger.get(session.warehouse(), analysis_id)


def _collapse_settings(st) -> Collapse:
    c = (st.settings or {}).get("collapse") or {}
    base = Collapse()
    return Collapse(replicates=c.get("replicates") or base.replicates, instances=c.get("instances") or base.instances,
                    failures=c.get("failures") or base.failures, holes=c.get("holes") or base.holes)


def stored_cells(wh, st):
    """A stored analysis's values per treatment and instance, recomputed on today's data by collapsing
    its stored slice, metric and collapse settings (a stored analysis keeps values per block only)."""
    from ..collapse.observations import collapse

    with wh.engine.connect() as conn:
        return collapse(conn, st.slice, st.metric or None, _collapse_settings(st)).every_cell


def _state_note(st) -> str | None:
    if st.state == "stale":
        return (f"analysis {st.id} is stale: {st.stale_runs} runs it used have since been retracted "
                f"(blockyard recheck {st.id} shows what changed)")
    if st.state == "tampered":
        return f"analysis {st.id} is tampered: its stored record no longer matches its digest; do not rely on it"
    return None


# --- plot --------------------------------------------------------------------------------------

def _plot_args(p):
    p.add_argument("kind", metavar="KIND", choices=KINDS,
                   help="profile (metric per block), qq (residual Q-Q), residuals (residuals vs fitted), "
                   "differences (a versus analysis's intervals), performance (performance profile), solved "
                   "(share of runs solved by each time, with --cutoff)")
    p.add_argument("--analysis", metavar="ID", help="draw a stored analysis (default: the session's last analysis, "
                   "else the slice and metric given)")
    add_slice(p)
    p.add_argument("--cutoff", metavar="SECONDS", help="solved on fresh data: the time limit, in the metric's units "
                   "(a stored analysis keeps its own)")
    p.add_argument("--to", required=True, metavar="FILE.png|FILE.svg", help="where to write the figure")
    add_json(p)


@dataclass
class PlotResult(Shown):
    kind: str
    file: str
    analysis_id: int | None
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"figure": self.kind, "file": self.file, "analysis_id": self.analysis_id}

    def render(self) -> str:
        return "\n".join([f"wrote {self.file}"] + [f"note      {n}" for n in self.notes])


def _fresh_cells(session: Session, a):
    from ..collapse.observations import collapse

    sl = slice_of(session, a).absolute()
    with session.warehouse().engine.connect() as conn:
        return collapse(conn, sl, metric_of(session, a), settings_of(session, a))


def _draw(kind: str, obs, cells_fn, comparisons, sense: str, metric: str, order, transform=None, versus=None):
    from ..present import figures as F

    if kind == "profile":
        return F.block_profile(obs, sense, metric, order)
    if kind == "qq":
        return F.residual_qq(F.analysis_scale(obs, transform), metric)
    if kind == "residuals":
        return F.residuals_vs_fitted(F.analysis_scale(obs, transform), metric, order)
    if kind == "differences":
        r = versus or {}
        return F.baseline_differences(comparisons, r.get("baseline", "baseline"), metric, sense, r.get("confidence") or 0.95)
    return F.performance_profile(cells_fn(), sense, metric)


@command("plot", "draw a figure: block profile, residual Q-Q, residuals vs fitted, baseline differences, "
         "performance profile",
         "blockyard plot differences --analysis 2 --to differences.png")
@args(_plot_args)
def cmd_plot(session: Session, a) -> PlotResult:
    from ..present import figures as F

    F.figure_format(a.to)  # refuse a wrong extension before any work
    fig, aid, notes = figure_of(session, a)
    F.save(fig, a.to)
    return PlotResult(a.kind, a.to, aid, notes)


def figure_of(session: Session, a):
    """The figure `plot` draws, with the analysis it drew (or None) and its notes: what the
    command writes to a file and a notebook shows (`Yard.plot`)."""
    import pandas as pd

    if a.kind not in KINDS:
        raise InputError(f"plot {a.kind}: choose one of {', '.join(KINDS)}")
    cutoff = getattr(a, "cutoff", None)
    explicit = getattr(a, "slice", None) is not None or getattr(a, "metric", None) is not None or cutoff is not None
    aid = _analysis_id(a.analysis, "--analysis")
    if aid is not None and explicit:
        raise InputError("--analysis draws the stored slice, metric and cutoff; leave out --slice, --metric and "
                         "--cutoff, or leave out --analysis to draw fresh data")
    if a.kind == "solved":
        return _plot_solved(session, a, aid, cutoff)
    if aid is None and not explicit and session.last_analysis is not None:
        aid = session.last_analysis
    notes: list[str] = []
    if aid is None:
        if a.kind == "differences":
            raise InputError("differences draws a stored versus analysis: run blockyard versus BASELINE, then "
                             "blockyard plot differences --analysis ID --to FILE")
        c = _fresh_cells(session, a)
        fig = _draw(a.kind, c.obs, lambda: c.every_cell, None, c.sense, c.metric, c.treatments)
    else:
        st = _stored(session, aid)
        r = st.result or {}
        if a.kind == "differences" and (st.kind != "versus" or not r.get("comparisons")):
            raise InputError(f"differences needs a versus analysis; analysis {st.id} is a {st.kind} "
                             "(blockyard versus BASELINE stores one)")
        if not st.observations and a.kind != "differences":
            raise InputError(f"analysis {st.id} is a {st.kind} and holds no observations to plot; "
                             "give --analysis of a blocktest or versus, or --slice and --metric to draw fresh data")
        note = _state_note(st)
        if note:
            notes.append(note)
        sense = r.get("sense") or "min"

        def cells():
            return stored_cells(session.warehouse(), st)

        if a.kind == "performance":
            notes.append(f"the performance profile needs values per instance, which analysis {st.id} does not keep: "
                         "it was recomputed on today's data from the analysis's slice, metric and collapse settings")
        transform = r.get("transform") if st.kind == "blocktest" else None
        fig = _draw(a.kind, pd.DataFrame(st.observations), cells, r.get("comparisons"), sense, st.metric or "value",
                    r.get("treatment_names"), transform, r)
    return fig, aid, notes


def _plot_solved(session: Session, a, aid: int | None, cutoff):
    """The solved-fraction figure: from a stored analysis's censored part, or fresh with --cutoff."""
    from ..present import figures as F

    notes: list[str] = []
    if aid is None:
        if cutoff is None:
            raise InputError("solved draws runtimes with a cutoff: give --cutoff SECONDS with --slice and --metric, "
                             "or --analysis ID of a blocktest or versus run with --cutoff")
        from ..analyses import censored_runtimes

        sl = slice_of(session, a).absolute()
        with session.warehouse().engine.connect() as conn:
            cen = censored_runtimes(conn, sl, metric_of(session, a), cutoff, holes=settings_of(session, a).holes)
        doc = cen.to_dict()
    else:
        st = _stored(session, aid)
        doc = (st.result or {}).get("censored")
        if not doc:
            raise InputError(f"analysis {st.id} is a {st.kind} without a cutoff; run blockyard blocktest or versus "
                             "with --cutoff SECONDS, then plot solved --analysis ID")
        note = _state_note(st)
        if note:
            notes.append(note)
    fig = F.solved_fraction(doc["per_treatment"], doc["cutoff"], doc.get("metric") or "time", doc.get("unit") or "")
    return fig, aid, notes


# --- export ------------------------------------------------------------------------------------

def _export_args(p):
    p.add_argument("id", metavar="ID", help="the stored analysis to report (blockyard recall lists them)")
    p.add_argument("--to", required=True, metavar="FILE.html|FILE.md",
                   help="HTML (one file, figures inside) or Markdown (figures in FILE_files/ beside it)")
    add_json(p)


@dataclass
class ExportResult(Shown):
    analysis_id: int
    file: str
    format: str
    figures: int
    state: str
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"analysis_id": self.analysis_id, "file": self.file, "format": self.format, "figures": self.figures}

    def render(self) -> str:
        return "\n".join([f"wrote report {self.file} (analysis {self.analysis_id}, {self.state})"]
                         + [f"note      {n}" for n in self.notes])


def used_imports(conn, st) -> list[dict]:
    """The imports holding runs under the stored slice, up to the analysis's last run (retracted ones too)."""
    from sqlalchemy import select

    from ..select.resolve import Dims, condition
    from ..store import schema as S

    if not st.max_run_id:
        return []
    dims = Dims.load(conn)
    cond = condition(st.slice, dims, conn, retracted="any")
    ids = select(S.runs.c.import_id).where(cond, S.runs.c.id <= st.max_run_id).distinct()
    q = (select(S.imports.c.file_name, S.campaigns.c.name.label("campaign"), S.imports.c.sha256, S.imports.c.loaded_at)
         .join(S.campaigns, S.campaigns.c.id == S.imports.c.campaign_id)
         .where(S.imports.c.id.in_(ids))
         .order_by(S.imports.c.loaded_at, S.imports.c.id))
    return [dict(r._mapping) for r in conn.execute(q)]


def _write_atomic(path: str, data: bytes) -> None:
    from ..present.figures import atomic_write

    atomic_write(path, lambda fh: fh.write(data))


def export_report(session: Session, analysis_id: int, path: str, now: float | None = None) -> ExportResult:
    """Write stored analysis `analysis_id` as an HTML or Markdown report to `path`."""
    from ..errors import BlockyardError
    from ..present import pages, report as R
    from ..present.document import ReportData

    ext = os.path.splitext(path)[1].lower()
    if ext not in REPORT_FORMATS:
        raise InputError(f"{path}: a report is written as {' or '.join(REPORT_FORMATS)}; give a file name ending in one of them")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise InputError(f"{path}: the folder {folder} does not exist")
    st = _stored(session, analysis_id)
    notes: list[str] = []
    try:
        with session.warehouse().engine.connect() as conn:
            imports = used_imports(conn, st)
    except BlockyardError as exc:  # the names the slice used are gone from a changed warehouse
        imports = []
        notes.append(f"the imports behind the slice could not be listed: {exc}")
    figs, fig_notes = R.draw_figures(st)
    data = ReportData(st, imports, time.time() if now is None else now, figs, notes + fig_notes)
    fmt = REPORT_FORMATS[ext]
    if fmt == "html":
        _write_atomic(path, pages.to_html(data).encode("utf-8"))
    else:
        stem = os.path.splitext(os.path.basename(path))[0]
        folder_name = f"{stem}_files"
        target = os.path.join(folder, folder_name)
        os.makedirs(target, exist_ok=True)
        links = {}
        for f in figs:
            name = f"analysis-{st.id}-{f.key}.png"
            _write_atomic(os.path.join(target, name), f.png)
            links[f.key] = f"{folder_name}/{name}"
        _write_atomic(path, pages.to_markdown(data, links).encode("utf-8"))
    return ExportResult(st.id, path, fmt, len(figs), st.state, data.notes)


@command("export", "write a stored analysis as an HTML or Markdown report with figures and full provenance",
         "blockyard export 2 --to pallets-vs-1.4.html")
@args(_export_args)
def cmd_export(session: Session, a) -> ExportResult:
    return export_report(session, _analysis_id(a.id, "export"), a.to)
