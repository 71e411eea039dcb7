"""UTC instants as text: ISO 8601 with a trailing "Z", at a stated resolution."""

from __future__ import annotations

import numpy as np

__all__ = ["utc_text", "utc_texts"]


def utc_text(t, unit: str = "ms") -> str | None:
    """One instant as ``YYYY-MM-DDThh:mm:ss.fffZ`` (``unit``: "s", "ms", "us", "ns"); None for None or NaT."""
    if t is None or np.isnat(np.datetime64(t, "ns")):
        return None
    return str(np.datetime64(t, unit)) + "Z"


def utc_texts(t: np.ndarray, unit: str = "ms") -> np.ndarray:
    """Many instants as :func:`utc_text` does one, vectorised; "" for NaT."""
    t = np.asarray(t, dtype="datetime64[ns]")
    return np.where(np.isnat(t), "", np.char.add(np.datetime_as_string(t, unit=unit), "Z"))
