"""Every command of this layer, in the order help lists them: one explicit list, so that no module
is imported for the side effect of registering. The command line adds the ones built on top of
the commands (the demo's walk, the shell, the resident) when it makes its table."""
from __future__ import annotations

from .analyse import cmd_blocktest, cmd_peek, cmd_plan, cmd_versus
from .guard import cmd_guard
from .ledger import cmd_keep, cmd_recall, cmd_recheck, cmd_retract
from .load import cmd_load
from .look import cmd_inventory
from .noise import cmd_noise
from .registry import Command, table
from .report import cmd_export, cmd_plot
from .setup import cmd_init, cmd_upgrade
from .verify import cmd_verify

COMMANDS = (cmd_init, cmd_upgrade, cmd_load, cmd_inventory, cmd_peek, cmd_blocktest, cmd_versus, cmd_guard, cmd_plan,
            cmd_noise, cmd_keep, cmd_recall, cmd_recheck, cmd_retract, cmd_plot, cmd_export, cmd_verify)


def commands(*extra) -> dict[str, Command]:
    """The catalog's commands, then the `extra` command functions a front end adds."""
    return table(*COMMANDS, *extra)
