"""Clean the loaded logs of one pass: order, de-duplicate, drop or repair bad rows, find spikes, gaps and
saturation, and write every decision into the ledger.
"""

from .logs import CleanedLog, CleanedPass, clean_log, clean_pass
from .rows import GAP_FACTOR, RANGE_MARGIN, find_gaps

__all__ = [
    "CleanedLog",
    "CleanedPass",
    "clean_pass",
    "clean_log",
    "find_gaps",
    "GAP_FACTOR",
    "RANGE_MARGIN",
]
