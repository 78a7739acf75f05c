"""Text for load and inventory."""
from __future__ import annotations

from .text import pairs, table


def render_load(res) -> str:
    out = []
    if getattr(res, "created", None):
        out.append(f"created warehouse {res.created}")
    if getattr(res, "unmade", None):
        out.append(f"no warehouse at {res.unmade} yet: checked against an empty one (a load without --dry-run creates it)")
    for r in res.reports:
        if r.status == "refused":
            out.append(f"refused  {r.file}: nothing from it was stored (the reason is on stderr)")
            continue
        if r.status == "duplicate":
            out.append(f"skipped  {r.file}: {r.message}")
            continue
        if r.status == "checked":
            out.append(f"checked  {r.file} (dry run, nothing stored)")
            out.append(pairs([(src, dst) for src, dst in r.mapping.items()], indent="  column  ") or "  (no columns mapped)")
            for m, sense in r.metrics.items():
                out.append(f"  metric  {m}: {'lower' if sense == 'min' else 'higher'} is better")
            if r.ignored:
                out.append(f"  ignored columns: {', '.join(r.ignored)}")
            if r.preview:
                cols = list(r.preview[0])
                out.append(table([[str(row[c]) for c in cols] for row in r.preview], cols))
            out.append(f"  would load {r.rows_loaded} of {r.rows_read} rows; {r.rows_rejected} rejected, "
                       f"{r.rows_skipped} already stored")
        else:
            out.append(f"loaded   {r.file}: {r.message}")
        for w in r.warnings:
            out.append(f"  caution  {w}")
    return "\n".join(out)


def render_inventory(inv) -> str:
    c = inv.counts
    if inv.kind is None:
        lines = [f"warehouse  {inv.warehouse}",
                 f"runs       {c['runs']} ({c['retracted']} retracted, not counted)",
                 f"campaigns  {c['campaigns']}    imports {c['imports']}    hosts {c['hosts']}",
                 f"solvers    {c['solvers']} ({c['treatments']} treatments: solver@version)    metrics {c['metrics']}",
                 f"families   {c['families']}    groups (blocks) {c['groups']}    instances {c['instances']}"]
        return "\n".join(lines)
    if not inv.rows:
        return f"no {inv.kind} yet"
    return table(inv.rows, inv.headers)
