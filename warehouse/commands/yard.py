"""One warehouse as one Python object with a plain method per job: what `warehouse.open()` returns.

    import warehouse
    with warehouse.open("campaigns.db") as yard:
        runs = yard.runs("family=mixed-sku", metric="pallets")      # a DataFrame, one row per run
        res = yard.versus("stacker@1.4", "family=mixed-sku", "pallets")
        res.table("comparisons")                                    # a DataFrame
        yard.keep("1.6 uses fewer pallets than 1.4", tags=["paper"])

Every method that a command also offers runs that command's own function, with the command's
own defaults and checks: the command line, the shell and a notebook do each job one way. The
keyword arguments are the command's long options with `_` for `-` (`skip_bad=True` is
`--skip-bad`); a mistake raises the same one-line exception (`warehouse.errors.InputError` and
its kin) whose text the command line prints. Analyses are kept in the ledger, as on the command
line. Results print as text, show themselves in a notebook, and give their parts as DataFrames
(`result.table(name)`, `result.tables()`).
"""
from __future__ import annotations

import argparse

from ..errors import InputError
from .session import Session

COLLAPSE_OPTIONS = ("replicates", "instances", "failures", "holes")


class Yard:
    """A warehouse, opened lazily: nothing connects until the first method that needs it."""

    def __init__(self, location: str | None = None, *, session: Session | None = None):
        self.session = session if session is not None else Session(location=location)

    # --- the object itself ---------------------------------------------------------------------

    @property
    def location(self) -> str:
        """Where the warehouse is (path or URL), as `-w` would resolve it."""
        return self.session.where

    def close(self) -> None:
        """Close the warehouse's connections (the object can be used again: it reopens)."""
        self.session.close()

    def __enter__(self) -> "Yard":
        return self

    def __exit__(self, *exc) -> bool:
        self.close()
        return False

    def __repr__(self) -> str:
        return f"<blockyard warehouse {self.location}>"

    # --- the one way a command runs ------------------------------------------------------------

    def call(self, command, namespace: argparse.Namespace):
        """Run a command (a `registry.Command`) on parsed options: what the command line and the
        shell do for every line, and what each method below does with its keyword arguments."""
        return command.run(self.session, namespace)

    def _run(self, name: str, **values):
        from .catalog import commands

        cmd = commands()[name]
        return self.call(cmd, _namespace(cmd, values))

    # --- loading and looking -------------------------------------------------------------------

    def init(self):
        """Create the warehouse (a SQLite file, or the tables in a PostgreSQL database)."""
        return self._run("init")

    def upgrade(self):
        """Bring an older warehouse to this version's schema."""
        return self._run("upgrade")

    def load(self, path, campaign: str, layout: str | None = None, **options):
        """Load one result file (or a list of them) into `campaign`; options: skip_bad, rejects,
        dry_run, again. A refused file raises its one-line error; nothing of it is stored."""
        files = [str(p) for p in path] if isinstance(path, (list, tuple)) else [str(path)]
        res = self._run("load", files=files, campaign=campaign, layout=None if layout is None else str(layout),
                        **options)
        errors = res.errors()
        if errors:
            from ..errors import BlockyardError

            loaded = len(res.reports) - len(errors)
            more = f" ({len(errors) - 1} more refused; {loaded} of {len(res.reports)} files stored or already there)" \
                if len(res.reports) > 1 else ""
            raise BlockyardError(errors[0] + more)
        return res

    def inventory(self, kind: str | None = None, limit: int | None = None):
        """What the warehouse holds: counts, or a listing of one kind (`result.table()`)."""
        return self._run("inventory", kind=kind, limit=limit)

    def runs(self, slice: str = "", metric: str | None = None):
        """The slice's runs as a DataFrame: one row per run with its campaign, solver, version,
        treatment, family, group, block, instance, seed, replicate, status, host, finished_at,
        import_id and source_line, then one column per metric (only `metric` when named)."""
        from ..select.frame import runs_frame

        sl = _slice(slice)
        with self.session.warehouse().engine.connect() as conn:
            return runs_frame(conn, sl, metric)

    def observations(self, slice: str = "", metric: str | None = None, **collapse):
        """One value per treatment and block, as the analyses see them: a DataFrame with
        `treatment`, `block`, `value` and the counts behind each value (`instances`, `runs`,
        `failed`). Collapse options: replicates, instances, failures, holes. What the collapse left
        out is in `frame.attrs["notes"]`."""
        from ..collapse.observations import collapse as collapse_runs

        sl = _slice(slice)
        settings = self._settings(collapse)
        with self.session.warehouse().engine.connect() as conn:
            c = collapse_runs(conn, sl, metric, settings)
        frame = c.obs.reset_index(drop=True).copy()
        frame.attrs.update(metric=c.metric, sense=c.sense, unit=c.unit, notes=list(c.notes),
                           dropped_blocks=list(c.dropped_blocks))
        return frame

    def peek(self, slice: str = "", metric: str | None = None, limit: int | None = None, **collapse):
        """Coverage of the slice: runs per treatment and block, holes, failures and cautions."""
        return self._run("peek", slice=slice, metric=metric, limit=limit, **collapse)

    # --- analyses ------------------------------------------------------------------------------

    def blocktest(self, slice: str = "", metric: str | None = None, **options):
        """The blocked ANOVA with its diagnostics and the rank tests; options: transform, design,
        pairs, cutoff and the collapse options. Kept in the ledger (`result.analysis_id`)."""
        return self._run("blocktest", slice=slice, metric=metric, **options)

    def versus(self, baseline: str, slice: str = "", metric: str | None = None, **options):
        """Every treatment against `baseline` (NAME@VERSION) on common blocks; options: method,
        adjust, better, margin, confidence, cutoff and the collapse options. Kept in the ledger."""
        return self._run("versus", baseline=baseline, slice=slice, metric=metric, **options)

    def guard(self, baseline: str, slice: str = "", metric: str | None = None, *, margin, **options):
        """Stop a change that made things worse than `baseline` by more than `margin` (units, or
        "2%"); options: confidence, markdown (a file to write the CI summary to) and the collapse
        options. `result.exit_status` is what the command exits with: 0 all not-worse, 3 some
        worse, 4 some inconclusive. Kept in the ledger."""
        return self._run("guard", baseline=baseline, slice=slice, metric=metric, margin=str(margin), **options)

    def noise(self, slice: str = "", metric: str | None = None, **options):
        """Variance components of group, instance and seed (pooled and per treatment, and those of
        a comparison); options: method (auto, anova, reml), confidence, time_metric. Kept in the
        ledger; `result.table("components")` is a DataFrame."""
        return self._run("noise", slice=slice, metric=metric, **options)

    def plan(self, **options):
        """Blocks needed for a comparison; options: effect, delta, means (a list or "a,b,c"), sd,
        sigma, from_analysis (an analysis id), blocks, power, alpha, comparisons; with noise (a
        kept noise analysis's id): budget_hours, run_seconds, max_groups, ...; more (a kept versus's
        id): the blocks that would likely settle each comparison."""
        if "from_analysis" in options:
            options["from_id"] = options.pop("from_analysis")
        if isinstance(options.get("means"), (list, tuple)):
            options["means"] = ",".join(str(m) for m in options["means"])
        for key in ("from_id", "noise", "more"):
            if options.get(key) is not None:
                options[key] = str(options[key])
        return self._run("plan", **options)

    # --- the ledger ----------------------------------------------------------------------------

    def keep(self, text: str, analysis: int | None = None, tags=()):
        """Keep a claim on an analysis (default: the last one this object ran)."""
        return self._run("keep", claim=text, analysis=None if analysis is None else str(analysis),
                         tag=list(tags) if not isinstance(tags, str) else [tags])

    def recall(self, text: str | None = None, *, tags=(), solver: str | None = None, since: str | None = None,
               stale: bool = False, limit: int | None = None):
        """The kept analyses that match, one row each, as a DataFrame (id, kind, state, when,
        slice, metric, claims ...). `analysis(id)` gives one in full."""
        import pandas as pd

        res = self._run("recall", what=text, tag=list(tags) if not isinstance(tags, str) else [tags], solver=solver,
                        since=since, stale=stale, limit=limit)
        rows = res.to_dict().get("matches", [])
        return pd.DataFrame(rows)

    def analysis(self, analysis_id: int):
        """One kept analysis in full: its claims, state, inputs and result (`recall ID`)."""
        return self._run("recall", what=str(analysis_id))

    def recheck(self, analysis_id: int, renew: bool = False):
        """Re-run a kept analysis on today's runs and say what changed; `renew=True` keeps the re-run."""
        return self._run("recheck", id=str(analysis_id), renew=renew)

    def retract(self, slice: str | None = None, reason: str | None = None, undo: int | None = None):
        """Withdraw the runs of `slice` (never deleted) for `reason`; `undo=ID` brings a retraction's runs back."""
        return self._run("retract", slice=slice, reason=reason, undo=undo)

    def verify(self, repair: bool = False):
        """Check the warehouse end to end (`result.ok`); `repair=True` remakes the summaries."""
        return self._run("verify", repair=repair)

    # --- figures and reports -------------------------------------------------------------------

    def plot(self, kind: str, slice: str | None = None, metric: str | None = None, analysis: int | None = None,
             cutoff=None, to: str | None = None):
        """A figure as a matplotlib Figure (kinds as `blockyard plot`: profile, qq, residuals,
        differences, performance, solved), of a kept analysis or of fresh data. With `to`, it is
        also written to that file."""
        from ..present import figures as F
        from .catalog import commands
        from .report import figure_of

        if to is not None:
            F.figure_format(str(to))
        a = _namespace(commands()["plot"], dict(kind=kind, slice=slice, metric=metric, cutoff=cutoff, to=to,
                                                analysis=None if analysis is None else str(analysis)))
        fig, _, notes = figure_of(self.session, a)
        if to is not None:
            F.save(fig, str(to))
        fig.notes = notes  # what the figure's analysis state or a recomputation needs said
        return fig

    def export(self, analysis: int, path: str):
        """Write a kept analysis as an HTML or Markdown report with figures and its provenance."""
        return self._run("export", id=str(analysis), to=str(path))

    # --- helpers -------------------------------------------------------------------------------

    def _settings(self, collapse: dict):
        from dataclasses import replace

        unknown = sorted(set(collapse) - set(COLLAPSE_OPTIONS))
        if unknown:
            raise InputError(f"unknown collapse option {unknown[0]}: choose from {', '.join(COLLAPSE_OPTIONS)}")
        return replace(self.session.collapse, **{k: v for k, v in collapse.items() if v is not None})


def _slice(text) -> object:
    from ..select.slices import parse

    if text is not None and not isinstance(text, str):
        raise InputError(f"a slice is text, e.g. \"family=mixed-sku version>=1.5\"; got {type(text).__name__}")
    return parse(text or "").absolute()


def _namespace(cmd, values: dict) -> argparse.Namespace:
    """The options of `cmd` as its own parser would give them, with `values` in place of the
    defaults. A name the command does not take is a one-line error naming the nearest one."""
    parser = argparse.ArgumentParser(prog=f"blockyard {cmd.name}", add_help=False)
    cmd.configure(parser)
    known = {a.dest: a for a in parser._actions if a.dest not in (argparse.SUPPRESS, "json")}
    ns = argparse.Namespace(**{dest: (a.default if a.default is not argparse.SUPPRESS else None)
                               for dest, a in known.items()})
    ns.json = False
    for key, value in values.items():
        if key not in known:
            from difflib import get_close_matches

            near = get_close_matches(key, list(known), n=1)
            hint = f" (did you mean {near[0]}?)" if near else ""
            raise InputError(f"{cmd.name}: no option {key}{hint}; it takes {', '.join(sorted(known))}")
        setattr(ns, key, value)
    return ns
