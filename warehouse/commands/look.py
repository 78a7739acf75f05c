"""What the warehouse holds: inventory."""
from __future__ import annotations

from dataclasses import dataclass

from .registry import add_json, args, command
from .session import Session
from ..shown import Shown


# --- inventory ---------------------------------------------------------------------------------

def _inventory_args(p):
    from ..select.inventory import KINDS

    p.add_argument("kind", nargs="?", choices=_Listings(KINDS), metavar="LISTING",
                   help=f"list one kind of thing: {', '.join(KINDS)} (default: counts only)")
    p.add_argument("--limit", type=int, help="show at most this many rows")
    add_json(p)


class _Listings(list):
    """The listings, for help and shell completion; argparse takes any word, so that inventory()
    answers a wrong one in its own words (with the nearest listing)."""

    def __contains__(self, item) -> bool:
        return True


@dataclass
class InventoryResult(Shown):
    inv: object

    def to_dict(self) -> dict:
        return self.inv.to_dict()

    def render(self) -> str:
        from ..present.loading import render_inventory

        return render_inventory(self.inv)


@command("inventory", "what the warehouse holds: counts, or a listing of one kind",
         "blockyard inventory solvers")
@args(_inventory_args)
def cmd_inventory(session: Session, a) -> InventoryResult:
    from ..select.inventory import inventory

    return InventoryResult(inventory(session.warehouse(), a.kind, a.limit))
