"""The anomaly record that every stage emits and the report lists."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .timetext import utc_text

__all__ = ["Anomaly", "SEVERITIES"]

SEVERITIES = ("info", "warning", "critical")


@dataclass(frozen=True)
class Anomaly:
    """One finding.

    Parameters
    ----------
    code : str
        snake_case code (telemetry_gap, coil_polarity_inverted, ...).
    severity : str
        "info", "warning" or "critical".
    evidence : str
        One sentence that carries the numbers behind the finding.
    start_utc, stop_utc : datetime64, optional
        The time window the finding covers.
    axis : str, optional
        "x", "y" or "z" (body), where the finding is about one axis.
    value : float, optional
        The headline figure.
    """

    code: str
    severity: str
    evidence: str
    start_utc: np.datetime64 | None = None
    stop_utc: np.datetime64 | None = None
    axis: str | None = None
    value: float | None = None

    def __post_init__(self):
        if self.severity not in SEVERITIES:
            raise ValueError(f"Expected severity in {SEVERITIES}, got {self.severity!r}")

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"code": self.code, "severity": self.severity}
        if self.axis is not None:
            d["axis"] = self.axis
        d["start_utc"] = utc_text(self.start_utc)
        d["stop_utc"] = utc_text(self.stop_utc)
        if self.value is not None:
            d["value"] = float(self.value)
        d["evidence"] = self.evidence
        return d
