"""What the archive keeps of one pass: the named figures (with units and families) and the pass record.

A :class:`Parameter` is one archived number; its 1-sigma, when the pass gives one, sits beside it in
``<name>_sigma``. The family groups parameters for the trend page and names their materiality threshold
(see :mod:`recon.fleet.settings`). A :class:`PassRecord` is what a worker returns for one pass and what
the archive stores in one transaction: the pass row, its measurements and its anomalies.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["AXES", "Parameter", "PARAMETERS", "FAMILIES", "Measurement", "AnomalyRecord", "PassRecord",
           "SEVERITY_ORDER"]

AXES = ("x", "y", "z")
SEVERITY_ORDER = ("critical", "warning", "info")


@dataclass(frozen=True)
class Parameter:
    """One archived figure of a pass.

    Attributes
    ----------
    name : archive column (units in the name); its 1-sigma is in ``<name>_sigma`` when ``has_sigma``
    family : the group it is plotted with and judged by (a key of :data:`FAMILIES`)
    unit : unit, for axis labels
    has_sigma : whether passes give a 1-sigma (or, for the gyro bias, a spread) with it
    """

    name: str
    family: str
    unit: str
    has_sigma: bool = True


# family -> what it is, for the trend page (in the order the page shows them)
FAMILIES: dict[str, str] = {
    "bias": "Magnetometer bias (sensor axes)",
    "soft_iron": "Soft iron and scale (symmetric matrix, sensor axes)",
    "misalignment": "Magnetometer misalignment (small angles, body from magnetometer)",
    "time_offset": "Magnetometer time-tag offset",
    "crosstalk": "Coil crosstalk K (row: magnetometer axis, column: coil)",
    "dipole_per_amp": "Coil dipole per amp, identified from the motion",
    "gyro_bias": "Gyro bias (median over the pass; bars: its spread over the pass)",
    "latency": "Actuation latency from the control tick",
    "attitude_accuracy": "Attitude accuracy (3-sigma, over the pass)",
    "rate_accuracy": "Rate accuracy (3-sigma, over the pass)",
}


def _parameters() -> tuple[Parameter, ...]:
    out = [Parameter(f"bias_{a}_nT", "bias", "nT") for a in AXES]
    out += [Parameter(f"soft_iron_{ij}", "soft_iron", "1") for ij in ("xx", "yy", "zz", "xy", "xz", "yz")]
    out += [Parameter(f"misalignment_{a}_deg", "misalignment", "deg") for a in AXES]
    out += [Parameter("time_offset_s", "time_offset", "s")]
    out += [Parameter(f"crosstalk_{r}{c}_nT_per_A", "crosstalk", "nT/A") for r in AXES for c in AXES]
    out += [Parameter(f"dipole_per_amp_{a}", "dipole_per_amp", "A m^2/A") for a in AXES]
    out += [Parameter(f"gyro_bias_{a}_dps", "gyro_bias", "deg/s") for a in AXES]
    out += [Parameter("latency_s", "latency", "s", has_sigma=False)]
    out += [Parameter(f"attitude_3sigma_deg_{s}", "attitude_accuracy", "deg", has_sigma=False)
            for s in ("median", "max")]
    out += [Parameter(f"rate_3sigma_dps_{s}", "rate_accuracy", "deg/s", has_sigma=False) for s in ("median", "max")]
    return tuple(out)


PARAMETERS: tuple[Parameter, ...] = _parameters()


@dataclass(frozen=True)
class Measurement:
    """The value of one :class:`Parameter` in one pass (None: not determined), with its 1-sigma."""

    name: str
    value: float | None
    sigma: float | None = None


@dataclass(frozen=True)
class AnomalyRecord:
    """One anomaly of one pass, as summary.json lists it."""

    code: str
    severity: str
    axis: str | None
    start_utc: str | None
    stop_utc: str | None
    value: float | None
    evidence: str


@dataclass(frozen=True)
class PassRecord:
    """Everything the archive keeps of one pass; what a worker returns.

    Attributes
    ----------
    pass_id : the mission file's ``[pass] id`` (``file:<path under the batch folder>`` when it is unreadable)
    mission_file : the mission file, absolute path
    input_hash : SHA-256 of the mission file and every file it names (see :func:`recon.fleet.input_hash`)
    status : "ok" or "failed"; error : the one-line error of a failed pass
    satellite, object_id : the optional ``[pass]`` keys
    start_utc, stop_utc : span of the pass's logs (ISO 8601 UTC)
    tool_version, verdict, estimate_mode : from summary.json
    crosstalk_source : which crosstalk estimate was archived ("combined" or "field_fit")
    polarity, dipole_per_amp_nominal : per coil x, y, z
    measurements : the :data:`PARAMETERS` of this pass, in that order
    anomalies : every anomaly of the pass, in summary order
    """

    pass_id: str
    mission_file: str
    input_hash: str
    status: str
    error: str | None = None
    satellite: str | None = None
    object_id: str | None = None
    start_utc: str | None = None
    stop_utc: str | None = None
    tool_version: str | None = None
    verdict: str | None = None
    estimate_mode: str | None = None
    crosstalk_source: str | None = None
    polarity: tuple[str | None, str | None, str | None] = (None, None, None)
    dipole_per_amp_nominal: tuple[float | None, float | None, float | None] = (None, None, None)
    measurements: tuple[Measurement, ...] = field(default_factory=tuple)
    anomalies: tuple[AnomalyRecord, ...] = field(default_factory=tuple)

    def count(self, severity: str) -> int:
        """How many anomalies of this severity the pass has."""
        return sum(a.severity == severity for a in self.anomalies)

    def measurement(self, name: str) -> Measurement:
        """The measurement of parameter ``name`` (value None when the pass has none)."""
        for m in self.measurements:
            if m.name == name:
                return m
        return Measurement(name, None, None)
