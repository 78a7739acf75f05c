"""Plain text rendering shared by every command: tables, numbers, key-value headers."""
from __future__ import annotations

import math
import sys
from collections.abc import Iterable, Sequence


def num(x, digits: int = 4) -> str:
    """A number with sensible precision: 4 significant digits, no exponent for ordinary sizes."""
    if x is None:
        return "-"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isnan(x):
        return "-"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == 0:
        return "0"
    mag = abs(x)
    if mag >= 1e6 or mag < 1e-4:
        return f"{x:.3g}"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(mag))))
    return f"{x:.{min(decimals, 6)}f}"


def signed(x, digits: int = 3) -> str:
    s = num(x, digits)
    return s if s.startswith("-") or s in ("0", "-") else "+" + s


def pval(p) -> str:
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "-"
    if p < 0.001:
        return "< 0.001"
    return f"{p:.3f}"


def table(rows: Sequence[Sequence], headers: Sequence[str], align: Sequence[str] | None = None,
          width: int | None = None) -> str:
    """A borderless table; columns beyond the terminal width are cut, with a note saying so."""
    from tabulate import tabulate  # here, not at the top: a load's message lines do not need it

    try:  # keep the cells' own spacing, so that markers after numbers line up
        text = tabulate(rows, headers=headers, tablefmt="plain", colalign=align, disable_numparse=True,
                        preserve_whitespace=True)
    except TypeError:  # tabulate before 0.10 has the module-level switch only
        text = tabulate(rows, headers=headers, tablefmt="plain", colalign=align, disable_numparse=True)
    if width is None and sys.stdout.isatty():
        import shutil  # (here: its archive modules are a tenth of `blockyard --help`'s imports)

        width = shutil.get_terminal_size((120, 24)).columns
    lines = text.splitlines()
    if width and lines and max(len(l) for l in lines) > width:
        cut = [l[: width - 1] for l in lines]
        cut.append(f"(table cut to {width} columns; widen the terminal or use --json for all of it)")
        return "\n".join(cut)
    return text


def pairs(items: Iterable[tuple[str, str]], indent: str = "") -> str:
    items = list(items)
    if not items:
        return ""
    w = max(len(k) for k, _ in items)
    return "\n".join(f"{indent}{k.ljust(w)}  {v}" for k, v in items)


def _json_value(o):
    """What json.dumps cannot write itself: numpy numbers (NaN and infinities as null) and arrays."""
    import math

    try:
        import numpy as np

        if isinstance(o, np.integer):
            return int(o)
        if isinstance(o, np.floating):
            v = float(o)
            return None if math.isnan(v) or math.isinf(v) else v
        if isinstance(o, np.ndarray):
            return o.tolist()
    except ImportError:  # pragma: no cover
        pass
    return str(o)


def json_document(result) -> str:
    """A result's --json document: its to_dict(), indented, numpy values made plain."""
    import json

    return json.dumps(result.to_dict(), indent=2, default=_json_value)
