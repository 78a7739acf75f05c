"""Imports every module that registers commands, in the order help lists them."""
from . import commands  # noqa: F401
from . import analysis_commands  # noqa: F401
from . import ledger_commands  # noqa: F401
from . import shell  # noqa: F401
from . import report_commands  # noqa: F401
