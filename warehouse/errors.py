"""One family of errors. The CLI turns each into one line on stderr and exit status 2."""
from __future__ import annotations


class BlockyardError(Exception):
    """Base of every error a user can cause or fix."""

    exit_status = 2


class InputError(BlockyardError):
    """A source file, layout or argument is wrong."""


class SliceError(BlockyardError):
    """A slice does not parse or names something unknown."""


class DesignError(BlockyardError):
    """The data under a slice cannot support the analysis asked for."""


class StorageError(BlockyardError):
    """The warehouse cannot be opened, written or upgraded."""
