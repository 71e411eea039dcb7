"""The ledger: one row per input line that was dropped, repaired or flagged, with its reason.

Every stage that sets a line aside writes ledger rows through :func:`ledger_frame`, so that the
columns and their types are the same everywhere.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = [
    "LEDGER_COLUMNS", "ledger_frame", "empty_ledger",
    "REASON_BAD_TIME", "REASON_MISSING", "REASON_NON_NUMERIC", "REASON_NON_FINITE",
]

# The ledger's columns. "sensor" names the log (two logs may share one file, each with its own view
# of a line).
LEDGER_COLUMNS = ["file", "line", "time_utc", "reason", "action", "detail", "sensor"]

# Reasons the loader gives for a line it cannot use (the byte scan adds its own: see csvscan)
REASON_BAD_TIME = "bad_time"
REASON_MISSING = "missing_value"
REASON_NON_NUMERIC = "non_numeric"
REASON_NON_FINITE = "non_finite"


def ledger_frame(label: str, sensor: str, line, time_utc, reason, action: str, detail) -> pd.DataFrame:
    """Ledger rows for one log (vectorised: ``line``, ``time_utc``, ``reason``, ``detail`` may be
    arrays or scalars broadcast to the length of ``line``)."""
    line = np.asarray(line, dtype=np.int64).ravel()
    n = line.size
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    t = np.broadcast_to(t, (n,)) if t.ndim == 0 else t.ravel()
    return pd.DataFrame({
        "file": np.full(n, label, dtype=object),
        "line": line,
        "time_utc": t,
        "reason": np.broadcast_to(np.asarray(reason, dtype=object), (n,)).copy(),
        "action": np.full(n, action, dtype=object),
        "detail": np.broadcast_to(np.asarray(detail, dtype=object), (n,)).copy(),
        "sensor": np.full(n, sensor, dtype=object),
    })


def empty_ledger() -> pd.DataFrame:
    """A ledger with no rows (and the usual columns and types)."""
    return ledger_frame("", "", np.zeros(0, dtype=np.int64), np.datetime64("NaT", "ns"), "", "", "")
