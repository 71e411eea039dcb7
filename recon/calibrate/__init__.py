"""Magnetometer calibration for one pass: time-tag offset, bias, soft iron and coil crosstalk (nT per A),
with uncertainties; the crosstalk from three estimates and a geometric prior, with the directions the
data do not determine held at the prior."""

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
from .fusion import CrosstalkFusion, fuse_crosstalk
from .prior import prior_sigma_nT_per_A
from .summary import (
    format_crosstalk_table,
)
from .timing import MAX_OFFSET_S, TimeOffset, mag_time_offset, time_offset_from_replay

__all__ = [
    "Calibration",
    "calibrate_pass",
    "calibrate_arrays",
    "CrosstalkAgreement",
    "compare_crosstalk",
    "combine_crosstalk",
    "format_crosstalk_table",
    "CrosstalkFusion",
    "fuse_crosstalk",
    "prior_sigma_nT_per_A",
    "TimeOffset",
    "MAX_OFFSET_S",
    "mag_time_offset",
    "time_offset_from_replay",
]
