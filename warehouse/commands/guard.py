"""guard: the nightly check that stops a change which made things worse than the baseline."""
from __future__ import annotations

from .analyse import _record, add_collapse, add_slice, metric_of, settings_of, slice_of
from .registry import add_json, args, command
from .session import Session


def _guard_args(p):
    p.add_argument("baseline", metavar="BASELINE", help="the treatment to guard, as NAME@VERSION")
    add_slice(p)
    p.add_argument("--margin", metavar="X|X%", help="required: the difference below which a change does not matter, "
                   "in the metric's units (0.5) or in percent of the baseline's mean on the common blocks (2%%)")
    p.add_argument("--confidence", type=float, default=0.95,
                   help="family-wise confidence of the one-sided bounds (default 0.95)")
    p.add_argument("--markdown", metavar="FILE", help="also write a short Markdown summary for a CI system: the "
                   "table, the cautions and the command that reproduces it")
    add_collapse(p)
    add_json(p)
    p.epilog = ("Each treatment is not-worse (its bound on being worse lies inside the margin), worse (worse by more "
                "than the margin, or failing significantly more often than the baseline) or inconclusive (with an "
                "estimate of the blocks that would settle it). Exit status 0 when all are not-worse, 3 when any is "
                "worse, 4 when none is worse but some are inconclusive, 2 for a mistake in the command.")


@command("guard", "stop a change that made things worse than the baseline by more than a margin (one-sided Dunnett)",
         'blockyard guard stacker@1.4 --slice "campaign=nightly-0412" --metric pallets --margin 2%')
@args(_guard_args)
def cmd_guard(session: Session, a):
    from ..analyses.guard import run_guard
    from ..errors import InputError

    sl = slice_of(session, a).absolute()
    settings = settings_of(session, a)
    wh = session.warehouse()
    with wh.engine.connect() as conn:
        res = run_guard(conn, sl, metric_of(session, a), settings, a.baseline, a.margin, a.confidence)
    _record(session, res, sl, settings)
    if getattr(a, "markdown", None):
        try:
            with open(a.markdown, "w", encoding="utf-8") as fh:
                fh.write(res.markdown(wh.display))
        except OSError as exc:
            raise InputError(f"--markdown {a.markdown}: cannot write it ({exc.strerror or exc}); "
                             "name a file in a folder that exists and can be written") from None
    return res
