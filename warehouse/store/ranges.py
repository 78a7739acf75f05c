"""The runs' id ranges of a set of imports (revision 0004): each import's runs are one range, so
a condition on imports (their campaign, their time range, the imports themselves) becomes a few
id ranges of the runs, read through the runs' own order instead of an index."""
from __future__ import annotations

from sqlalchemy import false, or_, select

from . import schema as S

R = S.runs

MAX_RANGES = 64  # beyond this many separate id ranges a slice tests one range around them all


def id_ranges(conn, imports_hit, T=R):
    """The run ids of the imports that meet `imports_hit` (a condition on imports), as id ranges.

    A date or campaign slice reads the imports' ranges, then only those id ranges of the runs;
    the slice's own test still applies to every run. Ranges that touch are joined, so the runs of
    a week of nightly loads are one range. An import without runs holds no range (and no import
    with runs gives a condition no run meets).
    """
    I = S.imports
    rows = conn.execute(select(I.c.first_run_id, I.c.last_run_id)
                        .where(imports_hit, I.c.first_run_id.is_not(None)).order_by(I.c.first_run_id)).all()
    merged: list[list[int]] = []
    for lo, hi in rows:
        if merged and lo <= merged[-1][1] + 1:
            merged[-1][1] = max(merged[-1][1], hi)
        else:
            merged.append([int(lo), int(hi)])
    if not merged:
        return false()
    if len(merged) > MAX_RANGES:
        return T.c.id.between(merged[0][0], merged[-1][1])  # (sorted and apart: the last ends last)
    return or_(*[T.c.id.between(lo, hi) for lo, hi in merged])
