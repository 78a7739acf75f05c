"""noise: how the runs of a slice vary between groups, instances and seeds (the variance components)."""
from __future__ import annotations

from .analyse import _record, _Words, add_slice, metric_of, slice_of
from .registry import add_json, args, command
from .session import Session


def _noise_args(p):
    add_slice(p)
    p.add_argument("--method", default="auto", choices=_Words(["auto", "anova", "reml"]),
                   help="auto (default): ANOVA estimates for balanced runs, REML for unbalanced; anova or reml forces one")
    p.add_argument("--confidence", type=float, default=0.95, help="confidence level of the intervals (default 0.95)")
    p.add_argument("--time-metric", metavar="NAME", help="the metric holding a run's seconds, for the plans made "
                   "from this analysis (default: a metric named or measured in seconds)")
    add_json(p)


@command("noise", "variance components of the runs: groups, instances within a group, seeds within an instance",
         'blockyard noise --slice "solver=stacker campaign=nov-tuning" --metric pallets')
@args(_noise_args)
def cmd_noise(session: Session, a):
    from ..analyses import run_noise

    sl = slice_of(session, a).absolute()
    with session.warehouse().engine.connect() as conn:
        res = run_noise(conn, sl, metric_of(session, a), getattr(a, "confidence", 0.95), getattr(a, "method", "auto"),
                        getattr(a, "time_metric", None))
    _record(session, res, sl, None)
    return res
