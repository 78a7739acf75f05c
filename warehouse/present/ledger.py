"""Text and JSON for recall and recheck."""
from __future__ import annotations

import time

from .text import num, pairs, pval, signed, table

STATE_WORDS = {"fresh": "fresh", "stale": "stale: some of its runs were retracted since",
               "tampered": "tampered: the stored result does not match its digest"}


def headline(kind: str, doc: dict) -> str:
    if kind == "blocktest":
        row = next((r for r in doc.get("anova", []) if r.get("source") == "treatment"), None)
        if not row:
            return ""
        p = pval(row.get("p"))
        return (f"{doc.get('metric')}: {doc.get('treatments')} treatments x {doc.get('blocks')} blocks, "
                f"treatment F = {num(row.get('f'), 3)}, p {p if p.startswith('<') else '= ' + p}")
    if kind == "versus":
        parts = []
        for r in doc.get("comparisons", []):
            parts.append(f"{r.get('treatment')} {signed(r.get('diff'))} ({r.get('verdict', '')})")
        return f"{doc.get('metric')} vs {doc.get('baseline')}: " + "; ".join(parts)
    if kind == "guard":
        parts = [f"{v.get('treatment')} {v.get('verdict')}" for v in doc.get("verdicts", [])]
        return f"{doc.get('metric')} against {doc.get('baseline')}, margin {doc.get('margin')}: " + "; ".join(parts)
    if kind == "plan":
        if "blocks_needed" in doc:
            return f"{doc['blocks_needed']} blocks needed (power {doc.get('power')}, alpha {doc.get('alpha')})"
        return f"power {num(doc.get('power'), 3)}"
    return ""


def _when(epoch) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.gmtime(epoch)) if epoch else ""


def summary_doc(st) -> dict:
    return {"analysis_id": st.id, "kind": st.kind, "created_at": _when(st.created_at), "slice": st.slice_text,
            "metric": st.metric, "headline": headline(st.kind, st.result), "state": st.state,
            "stale_runs": st.stale_runs, "claims": st.claims,
            "tags": sorted({t for c in st.claims for t in c["tags"]}),
            "renewed_from": st.renewed_from, "renewed_as": st.renewed_as}


def full_doc(st) -> dict:
    d = summary_doc(st)
    d.update(settings=st.settings, fingerprint=st.fingerprint, max_run_id=st.max_run_id, software=st.software,
             observations=st.observations, result=st.result)
    return d


def cut(text: str, width: int) -> str:
    """`text` in at most `width` characters; a shortened one ends in an ellipsis, so that the
    reader knows there is more (recall ID shows it whole)."""
    text = " ".join(str(text).split())  # a line break inside a claim would break the table's rows
    return text if len(text) <= width else text[: max(width - 1, 0)].rstrip() + "…"


def chain(st) -> str:
    parts = []
    if st.renewed_from is not None:
        parts.append(f"renewed from {st.renewed_from}")
    if st.renewed_as is not None:
        parts.append(f"renewed as {st.renewed_as}")
    return ", ".join(parts)


def render_recall_list(items) -> str:
    if not items:
        return "no stored analysis matches"
    rows = []
    for st in items:
        claim = ""
        if st.claims:
            more = f" (+{len(st.claims) - 1} more)" if len(st.claims) > 1 else ""
            claim = cut(st.claims[0]["text"], 60 - len(more)) + more
        tags = cut(", ".join(sorted({t for c in st.claims for t in c["tags"]})), 40)
        state = st.state + (f"; {chain(st)}" if chain(st) else "")
        rows.append([str(st.id), st.when(), st.kind, state, cut(headline(st.kind, st.result), 70), claim, tags])
    return table(rows, ["id", "made", "kind", "state", "result", "claim", "tags"])


def render_recall_one(st) -> str:
    items = [("analysis", f"{st.id} ({st.kind}), made {st.when()} UTC"),
             ("state", STATE_WORDS[st.state] + (f" ({st.stale_runs} runs)" if st.state == "stale" else "")),
             *([("renewed from", f"analysis {st.renewed_from} (this one re-ran it on newer data and took its claims)")]
               if st.renewed_from is not None else []),
             *([("renewed as", f"analysis {st.renewed_as} (it re-ran this one on newer data and holds its claims)")]
               if st.renewed_as is not None else []),
             ("slice", st.slice_text or "(everything)"), ("metric", st.metric or "-"),
             ("collapse", ", ".join(f"{k} {v}" for k, v in st.settings.get("collapse", {}).items()) or "-"),
             ("options", ", ".join(f"{k} {v}" for k, v in st.settings.get("options", {}).items() if v is not None) or "-"),
             ("result", headline(st.kind, st.result)),
             ("observations", f"{len(st.observations)} (treatment x block)"),
             ("fingerprint", st.fingerprint),
             ("software", ", ".join(f"{k} {v}" for k, v in st.software.items()))]
    out = [pairs(items)]
    for c in st.claims:
        tags = f"  [{', '.join(c['tags'])}]" if c["tags"] else ""
        out.append(f"claim {c['id']}  \"{c['text']}\"{tags}  ({_when(c['created_at'])})")
    for w in st.result.get("warnings", []):
        out.append(f"caution   {w}")
    if st.renewed_as is not None:
        out.append(f"next: blockyard recall {st.renewed_as} (the renewal of this analysis)")
    elif st.state != "fresh":
        out.append(f"next: blockyard recheck {st.id} (add --renew to keep the re-run and move the claims to it)")
    return "\n".join(out)


def _numbers(kind: str, doc: dict | None) -> list[tuple[str, str]]:
    if not doc:
        return []
    if kind == "blocktest":
        row = next((r for r in doc.get("anova", []) if r.get("source") == "treatment"), {})
        out = [("blocks", str(doc.get("blocks"))), ("treatment F", num(row.get("f"), 3)), ("p", pval(row.get("p")))]
        for m in doc.get("treatment_means") or []:
            out.append((f"mean {m.get('treatment')}", num(m.get("mean", m.get("adjusted_mean")))))
        return out
    if kind == "versus":
        out = [("blocks", str(doc.get("blocks")))]
        for r in doc.get("comparisons", []):
            out.append((f"{r['treatment']} diff", signed(r.get("diff"))))
            out.append((f"{r['treatment']} p adj", pval(r.get("p_adjusted"))))
        return out
    if kind == "guard":
        out = [("blocks", str(doc.get("blocks")))]
        for v in doc.get("verdicts", []):
            out.append((f"{v['treatment']} verdict", str(v.get("verdict"))))
            out.append((f"{v['treatment']} worse by at most", signed(v.get("bound"))))
        return out
    return [(k, str(doc.get(k))) for k in ("blocks_needed", "power", "alpha") if k in doc]


def render_recheck(rc) -> str:
    st = rc.stored
    say = {"unchanged": "unchanged: same runs, same values, same result",
           "data-changed": "data changed, conclusions hold",
           "conclusion-changed": "the conclusion changed",
           "tampered": "tampered: the stored result was edited after it was kept"}[rc.status]
    out = [f"analysis {st.id} ({st.kind}, made {st.when()} UTC): {say}"]
    if rc.runs_arrived or rc.runs_withdrawn:
        out.append(f"runs since: {rc.runs_arrived} arrived in its slice, {rc.runs_withdrawn} of its runs withdrawn")
    old = dict(_numbers(st.kind, st.result))
    new = dict(_numbers(st.kind, rc.new_doc))
    keys = list(dict.fromkeys([*old, *new]))
    rows = [[k, old.get(k, "-"), new.get(k, "-")] for k in keys]
    if rows:
        out.append(table(rows, ["", "stored", "today"], align=["left", "right", "right"]))
    for m in getattr(rc, "moved", []):
        out.append(f"moved     {m}")
    for c in rc.changes:
        out.append(f"changed   {c}")
    if rc.error:
        out.append(f"caution   {rc.error}")
    out += _renewal_lines(rc)
    return "\n".join(out)


def _renewal_lines(rc) -> list[str]:
    st = rc.stored
    if rc.stored_analysis is not None:
        moved = rc.claims_moved
        claims = (f"claim{'s' if len(moved) > 1 else ''} {', '.join(map(str, moved))} moved to it from analysis {st.id}"
                  if moved else f"analysis {st.id} had no claims to move")
        return [f"stored    analysis {rc.stored_analysis}, renewing analysis {st.id} (same kind, slice, metric "
                f"and settings, on today's data); analysis {st.id} stays as kept",
                f"claims    {claims}"]
    if rc.renew:
        return [f"stored    nothing: analysis {st.id} is unchanged, so it needs no renewal"]
    if st.renewed_as is not None:
        return [f"renewed   analysis {st.id} was renewed as analysis {st.renewed_as}, which holds its claims "
                f"(blockyard recheck {st.renewed_as})"]
    if rc.status in ("data-changed", "conclusion-changed") and rc.error is None:
        return [f"next      blockyard recheck {st.id} --renew keeps this re-run and moves the claims to it"]
    return []
