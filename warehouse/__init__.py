"""Blockyard: a results warehouse and blocked-analysis shell for benchmarking optimization solvers.

In Python (a notebook, a script):

    import warehouse
    with warehouse.open("campaigns.db") as yard:
        yard.blocktest("family=mixed-sku", "pallets")

`open` takes what `blockyard -w` takes: a path, a postgresql:// URL, or nothing (then
BLOCKYARD_WAREHOUSE, then the default file). docs/python.md walks through the methods.
"""
from __future__ import annotations

from .version import __version__


def open(location: str | None = None):  # noqa: A001 (the package's own name for it: warehouse.open)
    """The warehouse at `location` as one object with a method per job (`commands.yard.Yard`)."""
    from .commands.yard import Yard

    return Yard(None if location is None else str(location))


__all__ = ["__version__", "open"]
