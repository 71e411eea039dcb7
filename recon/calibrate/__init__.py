"""Magnetometer calibration for one pass: bias, soft iron and coil crosstalk (nT per A), with uncertainties."""

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

__all__ = [
    "Calibration",
    "calibrate_pass",
    "calibrate_arrays",
    "CrosstalkAgreement",
    "compare_crosstalk",
    "combine_crosstalk",
    "format_crosstalk_table",
]
