"""The alembic revision the schema module describes, apart from the tables: opening a warehouse
compares it with the stored one without importing SQLAlchemy (`store/connect.py`)."""

SCHEMA_REVISION = "0014"

# Revisions after this one change PostgreSQL alone (0009: its load references; 0010: runs
# partitioned by campaign; 0011: run ids from a sequence; 0012: the block summaries' references;
# 0013: the run key kept per campaign; 0014: the cell summaries partitioned by campaign):
# a SQLite file at this revision or later is current as it is, and opens without an upgrade
# (`blockyard upgrade` still stamps it with the latest).
SQLITE_CURRENT_FROM = "0008"
