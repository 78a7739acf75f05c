"""Making and upgrading a warehouse: init, upgrade."""
from __future__ import annotations


from .registry import Done, add_json, args, command
from .session import Session


# --- init, upgrade -----------------------------------------------------------------------------

def _init_args(p):
    add_json(p)


@command("init", "create a new warehouse (a SQLite file, or a PostgreSQL URL)",
         "blockyard init -w results.db", needs_warehouse=False)
@args(_init_args)
def cmd_init(session: Session, a) -> Done:
    from ..store.connect import init_warehouse, shown as shown_location
    from ..store.schema import SCHEMA_REVISION

    wh = init_warehouse(session.location)
    shown = wh.display
    wh.close()
    return Done(f"created warehouse {shown} (schema {SCHEMA_REVISION})\nnext: blockyard load FILE --campaign NAME -w {shown_location(session.where)}",
                {"warehouse": shown, "schema": SCHEMA_REVISION, "status": "created"})


@command("upgrade", "bring an older warehouse to this version's schema (copies the file aside first)",
         "blockyard upgrade -w results.db", needs_warehouse=False)
@args(_init_args)
def cmd_upgrade(session: Session, a) -> Done:
    from ..store.connect import upgrade_warehouse
    from ..store.schema import SCHEMA_REVISION

    wh, old, backup = upgrade_warehouse(session.location)
    shown = wh.display
    wh.close()
    if old == SCHEMA_REVISION:
        return Done(f"warehouse {shown} is already at schema {SCHEMA_REVISION}; nothing to do",
                    {"warehouse": shown, "from": old, "to": SCHEMA_REVISION, "backup": None, "status": "current"})
    where = f"; the old file is kept as {backup}" if backup else ""
    return Done(f"upgraded warehouse {shown} from schema {old} to {SCHEMA_REVISION}{where}",
                {"warehouse": shown, "from": old, "to": SCHEMA_REVISION, "backup": backup, "status": "upgraded"})
