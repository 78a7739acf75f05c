"""Text and Markdown for guard: the verdicts first, why each, the failures, the cautions, and the
command that gives the same answer again."""
from __future__ import annotations

from .analysis import _better, _collapse_line, render_failures
from .text import num, signed, table

WORDS = {"not-worse": "not worse", "worse": "worse", "inconclusive": "inconclusive"}
DEFAULTS = {"replicates": "mean", "instances": "mean", "failures": "drop", "holes": "drop"}


def reproduce(res, where: str | None = None) -> str:
    """The command line that runs this guard again (on today's runs), quoted for a POSIX shell."""
    import shlex

    c, o = res.collapsed, res.options
    words = ["blockyard", "guard", res.baseline]
    if where:
        words += ["-w", where]
    if c.slice_text:
        words += ["--slice", c.slice_text]
    words += ["--metric", c.metric, "--margin", str(o.get("margin"))]
    if float(o.get("confidence", 0.95)) != 0.95:
        words += ["--confidence", f"{float(o['confidence']):g}"]
    for key, value in (getattr(res, "settings", None) or {}).items():
        if value and value != DEFAULTS.get(key):
            words += [f"--{key}", str(value)]
    return " ".join(shlex.quote(w) for w in words)


def _margin_text(res) -> str:
    s, c = res.stats, res.collapsed
    unit = f" {c.unit}" if c.unit else ""
    given = str(res.options.get("margin"))
    if given.endswith("%"):
        base = s.baseline_mean
        of = f" of the baseline's mean {num(base)}" if base is not None else " of the baseline's mean"
        return f"{s.margin_units:.4g}{unit} ({given}{of} on the common blocks)"
    return f"{s.margin_units:.4g}{unit}"


def _more(v: dict) -> str:
    if v["verdict"] != "inconclusive":
        return ""
    if v["more_blocks"] is None:
        return "none would settle it"
    return f"about {v['more_blocks']}"


def _rows(res) -> list[list[str]]:
    rows = []
    for v in res.verdicts:
        rows.append([v["treatment"], WORDS[v["verdict"]], signed(v["difference"]), signed(v["bound"]),
                     signed(v["lower_bound"]), _more(v)])
    return rows


HEADERS = ["treatment", "verdict", "difference", "worse by at most", "worse by at least", "more blocks"]


def _counts(res) -> str:
    n = {k: sum(v["verdict"] == k for v in res.verdicts) for k in ("worse", "inconclusive", "not-worse")}
    parts = [f"{n[k]} {w}" for k, w in (("worse", "worse"), ("inconclusive", "inconclusive"),
                                         ("not-worse", "not worse")) if n[k]]
    return ", ".join(parts) + f": exit status {res.exit_status}"


def render_guard(res) -> str:
    c, s = res.collapsed, res.stats
    camp = ", ".join(c.campaigns.get(res.baseline, []))
    total = len(c.blocks) + len(c.dropped_blocks)
    worse = "higher" if s.worse == "higher" else "lower"
    lines = [f"guard     {res.baseline} ({camp})     common blocks {len(c.blocks)} of {total}     "
             f"metric {c.metric} ({_better(c.sense)})",
             f"margin    {_margin_text(res)}: {worse} than the baseline by less than this does not matter"]
    level = int(round(s.confidence * 100))
    if s.critical_value is not None:
        lines.append(f"method    Dunnett, one-sided in the worse direction, {level} % family-wise bounds, residual "
                     f"mean square {num(s.residual_ms)} on {s.residual_df} df, critical value {num(s.critical_value)}")
    else:
        lines.append("method    no comparison of values: no treatment but the baseline has one; failures only")
    lines.append(f"collapse  {_collapse_line(c)}")
    lines.append(f"used      {c.runs_used} of {c.runs_in_slice} runs, {c.instances_used} instances")
    lines += [f"          {n}" for n in c.notes]
    lines.append("")
    out = "\n".join(lines) + "\n" + table(_rows(res), HEADERS,
                                          align=["left", "left", "right", "right", "right", "left"])
    tail = ["difference = treatment - baseline, in the metric's units; 'worse by' is read in the worse direction, "
            f"with {level} % family-wise confidence; more blocks is an estimate (if the difference and the residual "
            "spread stay as they are)", "", "why"]
    tail += [f"  {v['treatment']}: {v['reason']}" for v in res.verdicts]
    if res.failures is not None:
        tail += ["", render_failures(res.failures.to_dict())]
    tail.append("")
    for w in res.warnings:
        tail.append(f"caution   {w}")
    tail.append(f"verdict   {_counts(res)}")
    if res.analysis_id is not None:
        tail.append(f"kept as analysis {res.analysis_id}")
    return out + "\n" + "\n".join(tail)


def _md_cell(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def markdown_guard(res, where: str | None = None) -> str:
    """A short summary a CI system can show: the verdict, the table, the cautions, the command."""
    c, s = res.collapsed, res.stats
    head = {0: "no treatment is worse than", 3: "a treatment is worse than", 4: "not settled against"}[res.exit_status]
    out = [f"## guard: {head} {_md_cell(res.baseline)} on {_md_cell(c.metric)}", "",
           f"Margin {_md_cell(_margin_text(res))}; {int(round(s.confidence * 100))} % family-wise one-sided "
           f"bounds (Dunnett) on {len(c.blocks)} common blocks; {_counts(res)}.", "",
           "| " + " | ".join(HEADERS) + " | why |",
           "| " + " | ".join(["---"] * 2 + ["---:"] * 3 + ["---", "---"]) + " |"]
    for row, v in zip(_rows(res), res.verdicts):
        out.append("| " + " | ".join(_md_cell(x) for x in row + [v["reason"]]) + " |")
    if res.warnings:
        out += ["", "Cautions:", ""]
        out += [f"- {_md_cell(w)}" for w in res.warnings]
    out += ["", "Run it again:", "", "```", reproduce(res, where), "```"]
    if res.analysis_id is not None:
        out += ["", f"Kept as analysis {res.analysis_id}."]
    return "\n".join(out) + "\n"
