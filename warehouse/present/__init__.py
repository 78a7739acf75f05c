"""Presentation layer: text tables, JSON documents, figures and reports. No SQL, no statistics."""
