"""The filter's time axis: seconds since an epoch held as integer nanoseconds (UTC), back to a time stamp."""

from __future__ import annotations

import numpy as np

from ..core import NS_PER_S

__all__ = ["utc_at"]


def utc_at(t_epoch_ns: int, t_s: float) -> np.datetime64:
    """The UTC time stamp ``t_s`` seconds after the epoch, rounded to the nanosecond."""
    return np.datetime64(int(t_epoch_ns + round(t_s * NS_PER_S)), "ns")
