"""Load the logs of one pass: read each CSV, map its columns, convert units and time bases to UTC.

Every input line is either a row of a :class:`SensorLog` or a ledger row naming its file, line and
reason. ``timescales`` holds the only conversions of GPS seconds, UNIX seconds, ISO text, onboard
ticks and TAI, TT or GPS calendar labels to UTC; ``column_times`` the one conversion of a time
column as a mission file's time spec describes it.
"""

from .columns import column_times, expected_time_text
from .ledger import (
    LEDGER_COLUMNS,
    REASON_BAD_TIME,
    REASON_MISSING,
    REASON_NON_FINITE,
    REASON_NON_NUMERIC,
    empty_ledger,
    ledger_frame,
)
from .logs import LoadedPass, SensorLog, amps_per_file_unit, load_log, load_pass
from .timescales import (
    EARLIEST_UTC,
    LATEST_UTC,
    gps_seconds_to_utc,
    iso_to_utc,
    ticks_to_utc,
    time_system_to_utc_ns,
    unix_seconds_to_utc,
    unwrap_ticks,
)

__all__ = [
    "LEDGER_COLUMNS",
    "SensorLog",
    "LoadedPass",
    "load_pass",
    "load_log",
    "amps_per_file_unit",
    "ledger_frame",
    "empty_ledger",
    "REASON_BAD_TIME",
    "REASON_MISSING",
    "REASON_NON_NUMERIC",
    "REASON_NON_FINITE",
    "EARLIEST_UTC",
    "LATEST_UTC",
    "iso_to_utc",
    "unix_seconds_to_utc",
    "gps_seconds_to_utc",
    "unwrap_ticks",
    "ticks_to_utc",
    "time_system_to_utc_ns",
    "column_times",
    "expected_time_text",
]
