"""The focus in a few words for the shell's toolbar: treatments x blocks, runs of a slice.

One counting query per focus change, and the only SQL the shell writes itself: from the cell
summaries where they can answer (much smaller than the runs), else on the runs. Both give the same
numbers; tests/front/shell/test_counting.py holds them side by side.
"""
from __future__ import annotations

from ...commands.session import Session


def count_runs(conn, cond) -> tuple[int, int, int]:
    """(treatments, blocks, runs) of a slice, counted on the runs themselves."""
    from sqlalchemy import func, select

    from ...store import schema as S

    R = S.runs
    q = (select(func.count(), func.count(func.distinct(R.c.solver_id)),
                func.count(func.distinct(S.instances.c.group_id)))
         .select_from(R.join(S.instances, S.instances.c.id == R.c.instance_id)).where(cond))
    runs, treatments, blocks = conn.execute(q).one()
    return int(treatments), int(blocks), int(runs)


def count_cells(conn, sl, dims) -> tuple[int, int, int] | None:
    """The same from the cell summaries (one metric slot per import counts its live runs), or
    None when they cannot answer: a term they do not carry, or a file with runs but no cells."""
    from sqlalchemy import and_, exists, func, select

    from ...select.resolve import cells_can_answer, condition
    from ...store import schema as S

    if not cells_can_answer(sl):
        return None
    cs, im = S.cell_stats, S.imports
    uncovered = conn.execute(select(func.count()).select_from(im).where(
        im.c.rows_loaded > 0, ~exists().where(cs.c.import_id == im.c.id))).scalar()
    if uncovered:
        return None
    first = select(cs.c.import_id, func.min(cs.c.slot).label("slot")).group_by(cs.c.import_id).subquery()
    q = (select(func.coalesce(func.sum(cs.c.n), 0), func.count(func.distinct(cs.c.solver_id)),
                func.count(func.distinct(S.instances.c.group_id)))
         .select_from(cs.join(first, and_(first.c.import_id == cs.c.import_id, first.c.slot == cs.c.slot))
                      .join(S.instances, S.instances.c.id == cs.c.instance_id))
         .where(condition(sl, dims, conn, table=cs)))
    runs, treatments, blocks = conn.execute(q).one()
    return int(treatments), int(blocks), int(runs)


def count_slice(session: Session, text: str) -> tuple[int, int, int]:
    """(treatments, blocks, runs) of the slice `text` in the session's warehouse."""
    from ...select.resolve import Dims, condition
    from ...select.slices import parse

    sl = parse(text)
    with session.warehouse().engine.connect() as conn:
        dims = Dims.load(conn)
        cond = condition(sl, dims, conn)  # resolves every name, or raises SliceError
        try:
            quick = count_cells(conn, sl, dims)
        except (ImportError, AttributeError):  # a warehouse layer without cell summaries
            quick = None
        return quick if quick is not None else count_runs(conn, cond)


def in_words(counts: tuple[int, int, int]) -> str:
    t, b, n = counts
    return f"{t} treatment{'s' * (t != 1)} x {b} block{'s' * (b != 1)}, {n} run{'s' * (n != 1)}"
