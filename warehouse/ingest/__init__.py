"""Ingest layer: reading result files and writing their runs into the warehouse."""
