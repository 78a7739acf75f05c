"""The alembic revision the schema module describes, apart from the tables: opening a warehouse
compares it with the stored one without importing SQLAlchemy (`store/connect.py`)."""

SCHEMA_REVISION = "0009"
