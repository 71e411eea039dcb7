"""Magnetometer calibration for one pass: time-tag offset, bias, soft iron and coil crosstalk (nT per A),
with uncertainties."""

from .agreement import (
    CrosstalkAgreement,
    combine_crosstalk,
    compare_crosstalk,
)
from .calibration import (
    Calibration,
    calibrate_arrays,
    calibrate_pass,
)
from .summary import (
    format_crosstalk_table,
)
from .timing import TimeOffset, mag_time_offset, time_offset_from_replay

__all__ = [
    "Calibration",
    "calibrate_pass",
    "calibrate_arrays",
    "CrosstalkAgreement",
    "compare_crosstalk",
    "combine_crosstalk",
    "format_crosstalk_table",
    "TimeOffset",
    "mag_time_offset",
    "time_offset_from_replay",
]
