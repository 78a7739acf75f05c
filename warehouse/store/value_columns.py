"""The metric value columns of the runs table (v1, v2, ...), present only for slots in use.

A new metric takes the lowest free slot; its column is added then, inside the load's own
transaction (ALTER TABLE ... ADD COLUMN changes the schema only: no stored row is rewritten, and
the rows stored before read NULL there). A refused load takes its column away with it.
"""
from __future__ import annotations

from sqlalchemy import inspect


def present(conn) -> set[int]:
    """The slots whose column the runs table has."""
    names = [c["name"] for c in inspect(conn).get_columns("runs")]
    return {int(n[1:]) for n in names if n[:1] == "v" and n[1:].isdigit()}


def ensure(conn, slot: int, have: set[int]) -> None:
    """Add the column of this slot when the table (whose slots are `have`) lacks it."""
    if int(slot) not in have:
        conn.exec_driver_sql(f"ALTER TABLE runs ADD COLUMN v{int(slot)} FLOAT")
        have.add(int(slot))
