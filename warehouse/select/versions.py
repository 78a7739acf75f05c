"""Versions compare naturally: 2.10 > 2.9; PEP 440 order where both sides parse as PEP 440."""
from __future__ import annotations

import re
from functools import cmp_to_key, lru_cache

_PARTS = re.compile(r"\d+|[^\d.]+")


@lru_cache(maxsize=4096)
def _pep440(v: str):
    from packaging.version import InvalidVersion, Version

    try:
        return Version(v)
    except InvalidVersion:
        return None


@lru_cache(maxsize=4096)
def _natural(v: str) -> tuple:
    return tuple((0, int(p), "") if p.isdigit() else (1, 0, p) for p in _PARTS.findall(v))


def compare(a: str, b: str) -> int:
    """-1, 0 or 1 as version a is older than, the same as, or newer than b."""
    pa, pb = _pep440(a), _pep440(b)
    if pa is not None and pb is not None:
        return (pa > pb) - (pa < pb)
    na, nb = _natural(a), _natural(b)
    return (na > nb) - (na < nb)


version_sort_key = cmp_to_key(compare)


def version_key(v: str):
    return version_sort_key(v)
