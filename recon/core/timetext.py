"""UTC instants as text (ISO 8601 with a trailing "Z", at a stated resolution) and as seconds since an epoch."""

from __future__ import annotations

import numpy as np

from .constants import NS_PER_S

__all__ = ["utc_text", "utc_texts", "seconds_since", "utc_at"]


def utc_text(t, unit: str = "ms") -> str | None:
    """One instant as ``YYYY-MM-DDThh:mm:ss.fffZ`` (``unit``: "s", "ms", "us", "ns"); None for None or NaT."""
    if t is None or np.isnat(np.datetime64(t, "ns")):
        return None
    return str(np.datetime64(t, unit)) + "Z"


def utc_texts(t: np.ndarray, unit: str = "ms") -> np.ndarray:
    """Many instants as :func:`utc_text` does one, vectorised; "" for NaT."""
    t = np.asarray(t, dtype="datetime64[ns]")
    return np.where(np.isnat(t), "", np.char.add(np.datetime_as_string(t, unit=unit), "Z"))


def seconds_since(t, epoch) -> np.ndarray:
    """Float seconds of the UTC times ``t`` (datetime64) since ``epoch`` (datetime64, or int64 ns since
    1970). The difference is taken in integer nanoseconds first, so no precision is lost to large
    absolute times."""
    e = np.int64(epoch) if isinstance(epoch, int | np.integer) else np.datetime64(epoch, "ns").astype(np.int64)
    return (np.asarray(t, dtype="datetime64[ns]").astype(np.int64) - e).astype(float) / NS_PER_S


def utc_at(epoch_ns: int, t_s: float) -> np.datetime64:
    """The UTC time stamp ``t_s`` seconds after the epoch (int ns since 1970), rounded to the nanosecond."""
    return np.datetime64(int(epoch_ns + round(t_s * NS_PER_S)), "ns")
