"""PostgreSQL: the runs table is partitioned by campaign (revision 0010), one partition a campaign.

A load of a campaign with no runs yet fills a table of its own (`fresh`), with no index but
the retracted runs' (which such a load leaves empty, revision 0012), then attaches it as the
campaign's partition (`attach`): PostgreSQL builds the block-range index on id by reading the
finished table once, a fraction of keeping an index up to date row by row (docs/performance.md).
The table carries a CHECK on its campaign, so attaching it reads no row to prove the partition
bound. It holds no run key: the load proved its runs new from the file's key hashes
(ingest/runkey.py).

A load into a campaign that holds runs already writes through the parent table into the
campaign's partition, under the partition's own unique run key (`keyed`: made by sorting for
the first such load, and kept; revision 0013); `ensure` makes that partition first when the
campaign has none (empty, attached at once).

The cell summaries are partitioned by campaign the same way (revision 0014): a new campaign's
load fills a table of its own with no index (`fresh_cells`) and, once it is full, builds its three
indexes by sorting and attaches it (`attach_cells`); a load into a campaign that holds runs
writes through cell_stats into the campaign's partition (`ensure_cells` makes it when missing).

Making, attaching and indexing a table are the owner's rights: they go through five functions
(revisions 0010, 0013 and 0014), which run as the schema's owner for anyone who may insert into
the table they serve (runs, or cell_stats), so a team member with the documented grants
(docs/reliability.md) loads as before. Attaching takes
SHARE UPDATE EXCLUSIVE on the parent, which neither readers nor the loads of other campaigns
(ROW EXCLUSIVE on the parent alone, store.connect.hold_runs_for_load) wait for; two attaches
take turns, for the moment between the one's attach and its commit. SQLite keeps one runs
table: nothing here applies to it.
"""
from __future__ import annotations


def partitioned(conn) -> bool:
    """Whether runs is a partitioned table here (PostgreSQL at revision 0010 or later)."""
    if conn.dialect.name == "sqlite":
        return False
    return conn.exec_driver_sql("SELECT relkind FROM pg_class WHERE oid = 'runs'::regclass").scalar() == "p"


def fresh(conn, campaign_id: int) -> str | None:
    """A table for a campaign with no partition yet: shaped like runs, with no index, not attached
    (None: the campaign has its partition)."""
    return conn.exec_driver_sql(f"SELECT blockyard_open_partition({int(campaign_id)}, false)").scalar()


def ensure(conn, campaign_id: int) -> None:
    """The campaign's partition, made empty and attached when it has none yet."""
    conn.exec_driver_sql(f"SELECT blockyard_open_partition({int(campaign_id)}, true)")


def keyed(conn, campaign_id: int) -> None:
    """The campaign partition's unique key on its live runs (solver, instance, seed, replicate),
    built now by sorting when the partition has none yet. The load holds
    the campaign's lock, so no other load of the campaign writes meanwhile; building it locks
    out the partition's other writers (a retraction, which waits for loads anyway), not readers
    and not loads of other campaigns."""
    conn.exec_driver_sql(f"SELECT blockyard_key_partition({int(campaign_id)})")


def attach(conn, campaign_id: int) -> None:
    """Make the filled table the campaign's partition: its block-range index on id is built here."""
    conn.exec_driver_sql(attach_sql(campaign_id))


def attach_sql(campaign_id: int) -> str:
    """The attach's statement (a load sends it from a helper thread: ingest/write.Sender)."""
    return f"SELECT blockyard_attach_partition({int(campaign_id)})"


def fresh_cells(conn, campaign_id: int) -> str | None:
    """A table for a new campaign's cell summaries: shaped like cell_stats, with no index, not
    attached (None: the campaign has its partition of cell_stats; revision 0014)."""
    return conn.exec_driver_sql(f"SELECT blockyard_open_cells({int(campaign_id)}, false)").scalar()


def ensure_cells(conn, campaign_id: int) -> None:
    """The campaign's partition of cell_stats, made empty and attached when it has none yet."""
    conn.exec_driver_sql(f"SELECT blockyard_open_cells({int(campaign_id)}, true)")


def attach_cells(conn, campaign_id: int) -> None:
    """Make the filled cell table the campaign's partition of cell_stats: its three indexes are
    built here by sorting, a third of what keeping them up to date row by row cost."""
    conn.exec_driver_sql(f"SELECT blockyard_attach_cells({int(campaign_id)})")


def same_columns(conn, name: str) -> None:
    """Give the unattached table each value column runs gained since it was made (a metric new in
    this load; only the owner can add one to runs, and the owner owns this table too)."""
    missing = conn.exec_driver_sql(
        "SELECT a.attname FROM pg_attribute a WHERE a.attrelid = 'runs'::regclass AND a.attnum > 0 "
        "AND NOT a.attisdropped AND a.attname NOT IN (SELECT b.attname FROM pg_attribute b "
        f"WHERE b.attrelid = '{name}'::regclass AND b.attnum > 0 AND NOT b.attisdropped)").scalars().all()
    for col in missing:
        conn.exec_driver_sql(f'ALTER TABLE {name} ADD COLUMN "{col}" double precision')
