"""A report's document model: the plain blocks (headings, paragraphs, key-value lists, tables,
figures, the state banner) that `present/report.py` fills and `present/pages.py` writes out as
HTML or Markdown, with the report's title and its few shared words."""
from __future__ import annotations

import time
from dataclasses import dataclass, field


# --- the document model ------------------------------------------------------------------------

@dataclass
class Heading:
    text: str
    level: int = 2


@dataclass
class Para:
    text: str
    kind: str = ""  # "" | "note"


@dataclass
class KV:
    pairs: list[tuple[str, str]]


@dataclass
class Table:
    headers: list[str]
    rows: list[list[str]]
    numeric: list[bool] = field(default_factory=list)  # right-align these columns


@dataclass
class Items:
    items: list  # str, or (text, [tags])


@dataclass
class Fig:
    key: str
    title: str
    caption: str


@dataclass
class State:
    state: str
    meaning: str


@dataclass
class FigureItem:
    key: str
    title: str
    caption: str
    png: bytes


@dataclass
class ReportData:
    stored: object  # ledger.Stored
    imports: list[dict]  # file_name, campaign, sha256, loaded_at
    exported_at: float
    figures: list[FigureItem] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # figures not drawn, provenance not found, ...

    @property
    def title(self) -> str:
        return report_title(self.stored)


def _utc(stamp) -> str:
    try:
        return time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime(float(stamp)))
    except (TypeError, ValueError, OverflowError):
        return "-"


def better_words(sense: str | None) -> str:
    return "higher is better" if sense == "max" else "lower is better"


def report_title(st) -> str:
    if st.claims:
        return str(st.claims[0]["text"])
    r = st.result or {}
    metric = st.metric or r.get("metric") or "the metric"
    if st.kind == "versus":
        return f"{metric}: every treatment against {r.get('baseline', 'the baseline')}"
    if st.kind == "blocktest":
        return f"{metric}: blocked comparison of {r.get('treatments', 'the')} treatments"
    if st.kind == "guard":
        return f"{metric}: is any treatment worse than {r.get('baseline', 'the baseline')}?"
    if st.kind == "plan":
        return "sample-size plan"
    if st.kind == "noise":
        return f"{metric}: where the runs vary (groups, instances, seeds)"
    return f"{st.kind} of {metric}"
