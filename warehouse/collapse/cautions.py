"""Cautions drawn from the collapsed data: things that make a comparison mislead if unsaid."""
from __future__ import annotations

import re

import pandas as pd

from .common import Collapsed

_TIME_UNITS = {"s", "sec", "secs", "second", "seconds", "ms", "min", "h", "us"}
_TIME_NAMES = re.compile(r"time|second|runtime|wall|cpu|elapsed|duration", re.I)


def is_time_metric(name: str, unit: str) -> bool:
    return unit.strip().lower() in _TIME_UNITS or bool(_TIME_NAMES.search(name))


def host_caution(c: Collapsed, baseline: str | None = None) -> list[str]:
    if not is_time_metric(c.metric, c.unit):
        return []
    # in the treatments' order (the hosts come in whatever order the database returned them)
    sets = {t: tuple(c.hosts[t]) for t in c.treatments if t in c.hosts}
    if len(set(sets.values())) <= 1:
        return []
    if baseline and baseline in sets:
        others = sorted({h for t, hs in sets.items() if t != baseline for h in hs})
        return [f"{c.metric} was measured on {', '.join(sets[baseline])} for the baseline but on "
                f"{', '.join(others)} for the others: host and treatment are confounded"]
    parts = "; ".join(f"{t} on {', '.join(h)}" for t, h in sets.items())
    return [f"{c.metric} was measured on different hosts ({parts}): host and treatment are confounded"]


def pseudo_replication(c: Collapsed) -> list[str]:
    """Blocks whose result profiles are identical across every treatment are probably one block twice."""
    if c.obs.empty or len(c.treatments) < 2:
        return []
    wide = c.obs.pivot(index="block", columns="treatment", values="value").dropna()
    # a block where every treatment ties has no profile to match: two such blocks (a constant
    # metric, say) are alike by the metric, not because they hold the same instances
    wide = wide[wide.round(9).nunique(axis=1) > 1]
    if len(wide) < 2:
        return []
    rounded = wide.round(9)
    dup = rounded[rounded.duplicated(keep=False)]
    if dup.empty:
        return []
    groups = dup.groupby(list(dup.columns)).groups
    out = []
    for _, blocks in groups.items():
        names = sorted(blocks)
        if len(names) > 1:
            out.append(f"blocks {', '.join(names)} have identical results for every treatment: probably the same "
                       "instances twice (pseudo-replication inflates significance); merge them or drop one")
    return out


#: a treatment's result "rests mostly" on imputed failures above this share of its values
IMPUTED_MOSTLY = 0.5


def imputed_failures(c: Collapsed) -> list[str]:
    """Treatments most of whose values are failed runs given a made-up value (--failures worst or
    penalize): their result then says more about the policy than about their runs."""
    if c.settings.get("failures") == "drop" or c.obs.empty or "failed" not in c.obs:
        return []
    out = []
    per = c.obs.groupby("treatment")[["runs", "failed"]].sum()
    for t in c.treatments:
        if t not in per.index or not per.loc[t, "runs"]:
            continue
        share = float(per.loc[t, "failed"]) / float(per.loc[t, "runs"])
        if share > IMPUTED_MOSTLY:
            how = "at the worst value seen on their instance" if c.settings["failures"] == "worst" else \
                f"at {c.settings['penalty']:g} x their value"
            out.append(f"{t}: {100 * share:.0f} % of its values are imputed failures (failed runs counted {how}): "
                       "its result rests more on the failure policy than on its runs")
    return out


def hash_pseudo_replication(conn, dims, group_ids) -> list[str]:
    """Groups whose instances carry identical content hashes."""
    from sqlalchemy import select

    from ..store import schema as S

    rows = conn.execute(select(S.instances.c.group_id, S.instances.c.content_hash)
                        .where(S.instances.c.group_id.in_(list(group_ids)), S.instances.c.content_hash != "")).all()
    if not rows:
        return []
    frame = pd.DataFrame(rows, columns=["group_id", "hash"])
    sets = frame.groupby("group_id")["hash"].apply(lambda s: tuple(sorted(set(s))))
    out = []
    for key, gids in sets.groupby(sets).groups.items():
        if len(gids) > 1:
            names = sorted(dims.block(g) for g in gids)
            out.append(f"groups {', '.join(names)} hold instances with identical content hashes: they are the same "
                       "block twice (pseudo-replication); merge them or drop one")
    return out


def design_cautions(c: Collapsed) -> list[str]:
    # (few blocks are warned about by each analysis, in its own words)
    return list(c.hash_conflicts)


def _listed(parts: list[tuple[str, int]]) -> str:
    return ", ".join(f"{name} ({n} runs)" for name, n in parts)


def pooling_cautions(c: Collapsed, baseline: str | None = None) -> list[str]:
    """Treatments whose runs come from more than one campaign or host (named, with counts), and a
    baseline drawn from other campaigns than the treatments it is compared with: each pools or
    confounds something a reader would want to know about."""
    out = []
    for t in c.treatments:
        src = c.sources.get(t, [])
        by_campaign: dict[str, int] = {}
        by_host: dict[str, int] = {}
        for campaign, host, n in src:
            by_campaign[campaign] = by_campaign.get(campaign, 0) + n
            by_host[host] = by_host.get(host, 0) + n
        if len(by_campaign) > 1:
            out.append(f"{t} pools runs from {len(by_campaign)} campaigns: {_listed(sorted(by_campaign.items()))}; "
                       "a difference between the campaigns is mixed into its result")
        if len(by_host) > 1:
            out.append(f"{t} pools runs from {len(by_host)} hosts: {_listed(sorted(by_host.items()))}")
        first, last, imports = c.periods.get(t, (None, None, 0))
        if first is not None and last is not None and last - first > POOLED_DAYS * DAY:
            out.append(f"{t} pools runs finished over {(last - first) / DAY:.0f} days ({_day(first)} to {_day(last)}, "
                       f"{imports} import{'s' if imports != 1 else ''}): whatever changed on the machines or in the "
                       "instance files over that time is mixed into its result")
    confounded = False
    if baseline and baseline in c.campaigns:
        base = set(c.campaigns[baseline])
        others = sorted({x for t in c.treatments if t != baseline for x in c.campaigns.get(t, [])} - base)
        if others:
            confounded = True
            out.append(f"the baseline {baseline} comes from {', '.join(sorted(base))} and the others (also) from "
                       f"{', '.join(others)}: campaign is confounded with treatment (see the drift line where a "
                       "treatment ran in both)")
    if baseline and not confounded:
        out += _period_apart(c, baseline)
    return out


POOLED_DAYS = 14  # a treatment's runs finished over more days than this pool periods (common practice: two weeks)
DAY = 86_400


def _day(stamp: int) -> str:
    import time

    return time.strftime("%Y-%m-%d", time.gmtime(stamp))


def _period_apart(c: Collapsed, baseline: str) -> list[str]:
    """A baseline whose runs all finished before (or after) every other treatment's, by a day or
    more: within one campaign, the period is then confounded with the treatment."""
    base = c.periods.get(baseline, (None, None, 0))
    rest = [c.periods[t] for t in c.treatments if t != baseline and t in c.periods]
    if base[0] is None or base[1] is None or not rest or any(p[0] is None or p[1] is None for p in rest):
        return []
    first, last = min(p[0] for p in rest), max(p[1] for p in rest)
    if base[1] + DAY <= first or last + DAY <= base[0]:
        return [f"the baseline {baseline}'s runs finished {_day(base[0])} to {_day(base[1])} and the others' "
                f"{_day(first)} to {_day(last)}: the period is confounded with treatment (a change of machines, "
                "load or instance files between them would read as a difference between treatments)"]
    return []
