"""Every table of a warehouse, declared once (SQLAlchemy Core).

Times are stored as integer seconds since the Unix epoch (UTC): compact, fast to compare and
identical on SQLite and PostgreSQL. Optional text fields hold '' rather than NULL so that unique
keys over them work the same on both databases.
"""
from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Column,
    Float,
    ForeignKey,
    ForeignKeyConstraint,
    Index,
    Integer,
    MetaData,
    SmallInteger,
    String,
    Table,
    Text,
    UniqueConstraint,
    text,
)

# The alembic revision this module describes (kept in store/revision.py, which opening a
# warehouse reads without SQLAlchemy); a test checks it equals the migrations' head.
from .revision import SCHEMA_REVISION  # noqa: E402,F401

NAME = 255  # longest name accepted for solvers, instances, groups, hosts, metrics

metadata = MetaData()

campaigns = Table(
    "campaigns",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(NAME), nullable=False, unique=True),
    Column("description", Text, nullable=False, server_default=""),
    Column("notes", Text, nullable=False, server_default=""),
    Column("created_at", BigInteger, nullable=False),
)

imports = Table(
    "imports",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("campaign_id", Integer, ForeignKey("campaigns.id"), nullable=False),
    Column("file_name", Text, nullable=False),
    # unique with the import it replaces (revision 0008): `load --again` stores a wholly
    # retracted file's bytes anew, and each import is replaced at most once
    Column("sha256", String(64), nullable=False),
    Column("layout", Text, nullable=False, server_default=""),
    Column("rows_read", Integer, nullable=False),
    Column("rows_loaded", Integer, nullable=False),
    Column("rows_rejected", Integer, nullable=False),
    Column("rows_skipped", Integer, nullable=False, server_default="0"),
    Column("loaded_at", BigInteger, nullable=False),
    Column("tool_version", String(32), nullable=False),
    # (revision 0004) the ids and finish times of this import's runs run from first to last: one
    # contiguous id range per import, so a date slice reads these rows, then only the id ranges
    # that can hold its runs (a zone map in place of an index over every run's time)
    Column("first_run_id", BigInteger, nullable=True),
    Column("last_run_id", BigInteger, nullable=True),
    Column("first_finished", BigInteger, nullable=True),
    Column("last_finished", BigInteger, nullable=True),
    # (revision 0008) the wholly retracted import this one loads again (`load --again`)
    Column("replaces_import_id", Integer, ForeignKey("imports.id"), nullable=True),
    Index("ux_imports_reload", "sha256", text("coalesce(replaces_import_id, 0)"), unique=True),
)

solvers = Table(
    "solvers",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(NAME), nullable=False),
    Column("version", String(NAME), nullable=False, server_default=""),
    Column("build", String(NAME), nullable=False, server_default=""),
    Column("params", Text, nullable=False, server_default=""),
    UniqueConstraint("name", "version", "build", "params", name="uq_solvers"),
)

families = Table(
    "families",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(NAME), nullable=False, unique=True),
)

groups = Table(
    "groups",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("family_id", Integer, ForeignKey("families.id"), nullable=False),
    Column("name", String(NAME), nullable=False),
    UniqueConstraint("family_id", "name", name="uq_groups"),
)

instances = Table(
    "instances",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("group_id", Integer, ForeignKey("groups.id"), nullable=False),
    Column("name", String(NAME), nullable=False),
    Column("content_hash", String(NAME), nullable=False, server_default=""),
    Column("attributes", Text, nullable=False, server_default=""),
    UniqueConstraint("group_id", "name", "content_hash", name="uq_instances"),
)

metrics = Table(
    "metrics",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(NAME), nullable=False, unique=True),
    Column("unit", String(NAME), nullable=False, server_default=""),
    Column("sense", String(3), nullable=False, server_default="min"),
    Column("slot", Integer, nullable=False, unique=True),
)

hosts = Table(
    "hosts",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(NAME), nullable=False, unique=True),
)

retractions = Table(
    "retractions",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("slice", Text, nullable=False),
    Column("reason", Text, nullable=False),
    Column("who", String(NAME), nullable=False, server_default=""),
    Column("at", BigInteger, nullable=False),
    Column("runs", Integer, nullable=False, server_default="0"),
    Column("undone_at", BigInteger, nullable=True),
)

# Metric values live in the run row itself, one column per metric slot: one row written per run
# keeps loads near SQLite's own insert speed and lets a slice aggregate without a join. The
# table declares every slot, but a warehouse holds only the columns of slots some metric has
# taken (revision 0004): `value_columns.ensure` adds one when a new metric takes its slot, so
# that a run row does not carry a NULL for every metric the warehouse never had.
METRIC_SLOTS = 24
VALUE_COLUMNS = [f"v{i}" for i in range(1, METRIC_SLOTS + 1)]

# status codes stored in runs.status
STATUS_CODES = {"ok": 0, "timeout": 1, "failed": 2, "infeasible": 3}
STATUS_NAMES = {v: k for k, v in STATUS_CODES.items()}


def _loaded_keys() -> list[ForeignKeyConstraint]:
    """The references a load writes into runs and cell_stats (campaign, import, solver, instance,
    host), declared for SQLite alone (revision 0009).

    Every such id comes from the dimension tables in the same load transaction, so a check per
    row only repeats what the load knows. SQLite's loads switch the checks off for the load
    (ingest/devices.ForeignKeysOff); PostgreSQL can switch them off only for a superuser, and
    they were two thirds of a PostgreSQL load (docs/performance.md). `blockyard verify` finds
    an id with no row behind it (store/audit.py), as it finds summaries out of step.
    The SQLAlchemy metadata keeps them either way, so joins still find their columns."""
    return [ForeignKeyConstraint([f"{col}_id"], [f"{table}.id"]).ddl_if(dialect="sqlite")
            for col, table in (("campaign", "campaigns"), ("import", "imports"), ("solver", "solvers"),
                               ("instance", "instances"), ("host", "hosts"))]


runs = Table(
    "runs",
    metadata,
    Column("id", BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=False),
    Column("campaign_id", Integer, nullable=False),
    Column("import_id", Integer, nullable=False),
    Column("solver_id", Integer, nullable=False),
    Column("instance_id", Integer, nullable=False),
    Column("seed", BigInteger, nullable=False),
    Column("replicate", Integer, nullable=False),
    Column("status", SmallInteger, nullable=False),
    Column("finished_at", BigInteger, nullable=True),
    Column("host_id", Integer, nullable=True),
    Column("source_line", Integer, nullable=False),
    Column("retraction_id", Integer, ForeignKey("retractions.id"), nullable=True),
    *[Column(name, Float, nullable=True) for name in VALUE_COLUMNS],
    *_loaded_keys(),
    # No run key on the table (live runs unique per campaign). A load proves its runs new from
    # the cell summaries and a hash of its own keys (ingest/runkey.py: StoredCells, RunHashes).
    # When a proof fails, or the campaign holds runs already on PostgreSQL, a unique index on
    # the one campaign's live keys refuses each taken key: on SQLite made and dropped inside the
    # load (revision 0007, campaign_key); on PostgreSQL the campaign partition's own key,
    # made by the first load that needs it and kept (revision 0013, store/partitions.keyed).
    # Live runs only (revision 0008): a file reloaded into its own campaign (`load --again`)
    # goes in beside its retracted runs, under the same keys; the loads keep other retracted
    # runs' keys themselves.
    # PostgreSQL partitions runs by campaign (revision 0010, store/partitions.py): a key on a
    # partitioned table must hold the partition column, so there an index on id stands
    # for the primary key (every load takes a block of ids of its own from runs_id_seq,
    # revision 0011): a block-range index, as a load writes its ids in rising order
    Index("ix_runs_id", "id", postgresql_using="brin", postgresql_with={"pages_per_range": 16}).ddl_if(dialect="postgresql"),
    # no index on finished_at: the imports' time ranges (revision 0004) narrow a date slice to id ranges
    # withdrawn runs are few: a partial index finds them without costing the loads anything
    Index("ix_runs_withdrawn", "retraction_id", sqlite_where=text("retraction_id IS NOT NULL"),
          postgresql_where=text("retraction_id IS NOT NULL")),
)

# --- the ledger (revision 0002) ---------------------------------------------------------------

analyses = Table(
    "analyses",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("kind", String(32), nullable=False),
    Column("slice_text", Text, nullable=False),
    Column("slice_parsed", Text, nullable=False),
    Column("metric", String(NAME), nullable=False, server_default=""),
    Column("settings", Text, nullable=False),
    Column("observations", Text, nullable=False),
    Column("max_run_id", BigInteger, nullable=False, server_default="0"),
    Column("fingerprint", String(64), nullable=False),
    Column("result", Text, nullable=False),
    Column("result_digest", String(64), nullable=False),
    Column("software", Text, nullable=False),
    Column("created_at", BigInteger, nullable=False),
    # (revision 0008) the stale analysis this one re-ran and took the claims of (`recheck --renew`)
    Column("renewed_from_id", Integer, ForeignKey("analyses.id"), nullable=True),
)

claims = Table(
    "claims",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("analysis_id", Integer, ForeignKey("analyses.id"), nullable=False),
    Column("text", Text, nullable=False),
    Column("tags", Text, nullable=False, server_default=""),
    Column("created_at", BigInteger, nullable=False),
)

# --- cell summaries (revision 0003) -----------------------------------------------------------
# One row per import, solver, instance, host and metric slot, summing that cell's live (not
# retracted) runs. A slice that names only treatments, campaigns, instances and hosts collapses
# from these rows instead of the runs: the work grows with the number of cells, not of runs.
# The loader writes them with the runs; retraction and its undo rebuild the cells they touch.
# PostgreSQL partitions them by campaign, as the runs (revision 0014, store/partitions.py): a
# new campaign's rows fill a table of their own, indexed by sorting once full, then attached.

cell_stats = Table(
    "cell_stats",
    metadata,
    Column("campaign_id", Integer, nullable=False),
    Column("import_id", Integer, nullable=False),
    Column("solver_id", Integer, nullable=False),
    Column("instance_id", Integer, nullable=False),
    Column("host_id", Integer, nullable=True),
    Column("slot", SmallInteger, nullable=False),
    Column("n", BigInteger, nullable=False),
    Column("n_ok", BigInteger, nullable=False),
    Column("sum_ok", Float, nullable=True),
    Column("sq_ok", Float, nullable=True),
    Column("min_ok", Float, nullable=True),
    Column("max_ok", Float, nullable=True),
    Column("n_fail", BigInteger, nullable=False),
    Column("n_fail_v", BigInteger, nullable=False),
    Column("sum_fail_v", Float, nullable=True),
    Column("id_sum", BigInteger, nullable=False),
    Column("id_max", BigInteger, nullable=False),
    Index("ix_cells_campaign", "campaign_id", "slot", "solver_id", "instance_id"),
    Index("ix_cells_solver", "solver_id", "slot", "instance_id"),
    # the import alone (revision 0005): a load appends its entries in order, slot after slot
    Index("ix_cells_import", "import_id"),
    *_loaded_keys(),
)

# --- block summaries (revision 0006) ----------------------------------------------------------
# One row per import, metric slot, solver and group (block), summing that import's cells as the
# default collapse sees them (store/blocks.py): the fingerprint's whole-number sums over every
# cell, and over the cells with a value their count, the sum of their means and their run counts;
# `group_valued` is how many instances of the block some solver of the import has a value on. A
# slice of whole campaigns, treatments and blocks collapses from these few hundred rows an import.

block_stats = Table(
    "block_stats",
    metadata,
    Column("campaign_id", Integer, nullable=False),
    Column("import_id", Integer, nullable=False),
    Column("slot", SmallInteger, nullable=False),
    Column("solver_id", Integer, nullable=False),
    Column("group_id", Integer, nullable=False),
    Column("n", BigInteger, nullable=False),
    Column("n_ok", BigInteger, nullable=False),
    Column("n_fail", BigInteger, nullable=False),
    Column("id_sum", BigInteger, nullable=False),
    Column("w_ids", BigInteger, nullable=False),
    Column("cells", BigInteger, nullable=False),
    Column("inst", BigInteger, nullable=False),
    Column("id_max", BigInteger, nullable=False),
    Column("lost", BigInteger, nullable=False),
    Column("vcells", BigInteger, nullable=False),
    Column("vsum", Float, nullable=True),
    Column("v_n", BigInteger, nullable=False),
    Column("v_fail", BigInteger, nullable=False),
    Column("v_ok", BigInteger, nullable=False),
    Column("group_valued", BigInteger, nullable=False),
    Index("ix_blocks_campaign", "campaign_id", "slot", "solver_id"),
    Index("ix_blocks_import", "import_id"),
    # declared for SQLite alone (revision 0012), as the runs' and cells' (_loaded_keys)
    *[ForeignKeyConstraint([f"{col}_id"], [f"{table}.id"]).ddl_if(dialect="sqlite")
      for col, table in (("campaign", "campaigns"), ("import", "imports"), ("solver", "solvers"),
                         ("group", "groups"))],
)
