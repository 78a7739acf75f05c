"""The version of Blockyard: one place, imported by the package root and whatever records it."""
__version__ = "0.1.0"
