"""The two writers of a report: HTML (figures inline, every value escaped with html.escape) and
Markdown (figures beside it, Markdown punctuation and HTML-significant characters escaped). Both
walk the same blocks, made by `present/report.py`, so both formats carry the same content."""
from __future__ import annotations

import base64
import html
from urllib.parse import quote

from .document import KV, Fig, Heading, Items, Para, ReportData, State, Table
from .report import content


# --- HTML --------------------------------------------------------------------------------------

CSS = """
body { font-family: "Source Sans 3", "Segoe UI", "Helvetica Neue", Arial, sans-serif; color: #26323b;
       background: #f7f8f6; margin: 0; line-height: 1.45; }
main { max-width: 68rem; margin: 0 auto; padding: 1.5rem 2rem 3rem; background: #ffffff; }
h1 { font-size: 1.7rem; margin: 0.4rem 0 0.2rem; }
h2 { font-size: 1.2rem; margin: 2rem 0 0.6rem; padding-bottom: 0.2rem; border-bottom: 2px solid #dde3e8; }
h3 { font-size: 1rem; margin: 1.2rem 0 0.4rem; color: #1f5f8b; }
p.note { color: #55606a; font-size: 0.9rem; }
.state { margin: 1rem 0; padding: 0.8rem 1rem; border-left: 0.5rem solid; border-radius: 0.2rem; }
.state strong { font-size: 1.25rem; letter-spacing: 0.04em; margin-right: 0.6rem; text-transform: uppercase; }
.state-fresh { border-color: #2f7a5a; background: #eaf4ee; }
.state-stale { border-color: #a8861c; background: #fbf4df; }
.state-tampered { border-color: #a8432b; background: #f9e7e2; }
table { border-collapse: collapse; margin: 0.4rem 0 0.8rem; font-size: 0.92rem; }
th, td { padding: 0.25rem 0.7rem; border-bottom: 1px solid #e4e8eb; vertical-align: top; }
th { text-align: left; background: #eef1f3; font-weight: 600; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
dl { display: grid; grid-template-columns: max-content 1fr; gap: 0.2rem 1.2rem; margin: 0.4rem 0; }
dt { color: #55606a; }
dd { margin: 0; overflow-wrap: anywhere; }
.tag { display: inline-block; font-size: 0.8rem; padding: 0 0.45rem; margin-left: 0.3rem; border-radius: 0.7rem;
       background: #e3ecf3; color: #1f5f8b; }
figure { margin: 1rem 0 1.6rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #e4e8eb; }
figcaption { font-size: 0.9rem; color: #55606a; max-width: 48rem; }
.wide { overflow-x: auto; }
"""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def to_html(data: ReportData) -> str:
    pngs = {f.key: f.png for f in data.figures}
    parts = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>{_e(data.title)}</title>", f"<style>{CSS}</style>", "</head>", "<body>", "<main>"]
    for b in content(data):
        if isinstance(b, Heading):
            parts.append(f"<h{b.level}>{_e(b.text)}</h{b.level}>")
        elif isinstance(b, Para):
            cls = f' class="{_e(b.kind)}"' if b.kind else ""
            parts.append(f"<p{cls}>{_e(b.text)}</p>")
        elif isinstance(b, State):
            parts.append(f'<div class="state state-{_e(b.state)}"><strong>{_e(b.state)}</strong> {_e(b.meaning)}</div>')
        elif isinstance(b, KV):
            parts.append("<dl>" + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in b.pairs) + "</dl>")
        elif isinstance(b, Items):
            lis = []
            for it in b.items:
                if isinstance(it, tuple):
                    text, tags = it
                    lis.append(f"<li>{_e(text)}" + "".join(f'<span class="tag">{_e(t)}</span>' for t in tags) + "</li>")
                else:
                    lis.append(f"<li>{_e(it)}</li>")
            parts.append("<ul>" + "".join(lis) + "</ul>")
        elif isinstance(b, Table):
            num_col = b.numeric or [False] * len(b.headers)

            def cls(i):
                return ' class="n"' if i < len(num_col) and num_col[i] else ""

            head = "".join(f"<th{cls(i)}>{_e(h)}</th>" for i, h in enumerate(b.headers))
            body = "".join("<tr>" + "".join(f"<td{cls(i)}>{_e(c)}</td>" for i, c in enumerate(row)) + "</tr>"
                           for row in b.rows)
            parts.append(f'<div class="wide"><table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>')
        elif isinstance(b, Fig):
            src = "data:image/png;base64," + base64.b64encode(pngs[b.key]).decode("ascii")
            parts.append(f'<figure><img src="{src}" alt="{_e(b.title)}"><figcaption><strong>{_e(b.title)}.</strong> '
                         f"{_e(b.caption)}</figcaption></figure>")
    parts += ["</main>", "</body>", "</html>"]
    return "\n".join(parts) + "\n"


# --- Markdown ----------------------------------------------------------------------------------

_MD_SPECIAL = "\\`*_[]|#"


def md(x) -> str:
    """Text for Markdown: punctuation that would format is escaped, HTML-significant characters
    become entities (a renderer would otherwise pass raw HTML through), line breaks become spaces."""
    s = str(x).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = "".join("\\" + ch if ch in _MD_SPECIAL else ch for ch in s)
    return " ".join(s.split("\n")).replace("\r", " ")


def to_markdown(data: ReportData, links: dict[str, str]) -> str:
    """The report as Markdown; `links` maps a figure key to its path relative to the .md file."""
    out: list[str] = []
    for b in content(data):
        if isinstance(b, Heading):
            out += ["#" * b.level + " " + md(b.text), ""]
        elif isinstance(b, Para):
            out += [f"*{md(b.text)}*" if b.kind == "note" else md(b.text), ""]
        elif isinstance(b, State):
            out += [f"> **state: {md(b.state).upper()}** - {md(b.meaning)}", ""]
        elif isinstance(b, KV):
            out += [f"- **{md(k)}**: {md(v)}" for k, v in b.pairs] + [""]
        elif isinstance(b, Items):
            for it in b.items:
                if isinstance(it, tuple):
                    text, tags = it
                    out.append(f"- {md(text)}" + (" - tags: " + ", ".join(f"`{t.replace('`', '')}`" for t in tags) if tags else ""))
                else:
                    out.append(f"- {md(it)}")
            out.append("")
        elif isinstance(b, Table):
            num_col = b.numeric or [False] * len(b.headers)
            out.append("| " + " | ".join(md(h) for h in b.headers) + " |")
            out.append("|" + "|".join(" ---: " if i < len(num_col) and num_col[i] else " --- "
                                      for i in range(len(b.headers))) + "|")
            for row in b.rows:
                out.append("| " + " | ".join(md(c) if str(c) != "" else " " for c in row) + " |")
            out.append("")
        elif isinstance(b, Fig):
            out += [f"![{md(b.title)}]({quote(links[b.key])})", "", f"*{md(b.title)}.* {md(b.caption)}", ""]
    return "\n".join(out).rstrip() + "\n"
