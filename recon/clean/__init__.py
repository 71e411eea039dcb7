"""Clean the loaded logs of one pass: order, de-duplicate, drop or repair bad rows, find spikes, gaps and
saturation, and write every decision into the ledger.
"""

from .logs import (
    GAP_FACTOR,
    RANGE_MARGIN,
    CleanedLog,
    CleanedPass,
    clean_log,
    clean_pass,
    find_gaps,
    format_inspect_table,
    write_ledger,
)

__all__ = [
    "CleanedLog",
    "CleanedPass",
    "clean_pass",
    "clean_log",
    "find_gaps",
    "format_inspect_table",
    "write_ledger",
    "GAP_FACTOR",
    "RANGE_MARGIN",
]
