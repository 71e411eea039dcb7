"""The checked mission file as dataclasses, and the values each choice key allows.

Only data lives here: reading and checking the TOML is :mod:`recon.config.mission`'s job.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "TimeSpec", "SensorSpec", "CoilSpec", "ControllerSpec", "PositionsSpec", "OrbitSpec", "EstimatorSpec",
    "Mission", "TIME_FORMATS", "MAG_UNITS", "GYRO_UNITS", "COIL_UNITS", "MAG_SAMPLING", "LAWS",
    "ESTIMATOR_MODES", "SECTIONS",
]

TIME_FORMATS = ("iso", "unix", "gps", "ticks")
MAG_UNITS = ("nT", "uT", "mG", "G", "T")
GYRO_UNITS = ("rad/s", "deg/s")
COIL_UNITS = ("A", "mA", "duty")
MAG_SAMPLING = ("coils_off", "coils_on", "windowed")
LAWS = ("bdot", "cross_product", "none")
ESTIMATOR_MODES = ("auto", "gyro", "dynamics")
# The top-level tables a mission file may have
SECTIONS = {"pass", "spacecraft", "orbit", "magnetometer", "gyro", "coils", "controller", "estimator"}


@dataclass(frozen=True)
class TimeSpec:
    """How one log stamps its rows.

    ``format``: "iso" (UTC strings), "unix" (s since 1970 UTC), "gps" (s since 1980-01-06 on the GPS
    scale), "ticks" (onboard counter: ``epoch + count / rate_hz``, wrapping at ``2**rollover_bits``).
    """

    column: str
    format: str
    epoch: np.datetime64 | None = None
    rate_hz: float | None = None
    rollover_bits: int | None = None


@dataclass(frozen=True)
class SensorSpec:
    """A magnetometer or gyro log. ``full_scale`` and ``noise`` are in the file's unit (after scale
    and offset); ``sensor_to_body`` is M with v_body = M @ v_sensor. Magnetometer only: the prior of
    its misalignment to the body (``misalignment_deg``, small angles about body x, y, z, body from
    magnetometer, and its 1-sigma ``misalignment_sigma_deg``), for passes too slow to measure it."""

    file: Path
    time: TimeSpec
    columns: tuple[str, str, str]
    unit: str
    sensor_to_body: np.ndarray
    full_scale: float | None = None
    noise: float | None = None
    bias_walk: float | None = None
    scale: float = 1.0
    offset: float = 0.0
    misalignment_deg: np.ndarray | None = None
    misalignment_sigma_deg: float | None = None


@dataclass(frozen=True)
class CoilSpec:
    """The coil-current log and the coils' nominal model (m_body = dipole_per_amp @ i)."""

    file: Path
    time: TimeSpec
    columns: tuple[str, str, str]
    unit: str
    max_current_A: np.ndarray
    dipole_per_amp: np.ndarray
    mag_sampling: str
    off_window_s: tuple[float, float] | None = None
    scale: float = 1.0
    offset: float = 0.0


@dataclass(frozen=True)
class ControllerSpec:
    """The onboard magnetic control law. ``gain``: B-dot A m^2 s / T; cross-product 1/s."""

    law: str
    gain: float
    period_s: float
    first_tick: np.datetime64 | None = None
    target_momentum_Nms: np.ndarray | None = None


@dataclass(frozen=True)
class PositionsSpec:
    file: Path
    time: TimeSpec
    columns: tuple[str, str, str]
    frame: str
    unit: str


@dataclass(frozen=True)
class OrbitSpec:
    """Exactly one of ``tle`` (two lines), ``positions`` or ``oem`` is set."""

    tle: tuple[str, str] | None = None
    positions: PositionsSpec | None = None
    oem: Path | None = None

    @property
    def kind(self) -> str:
        return "tle" if self.tle else ("positions" if self.positions else "oem")


@dataclass(frozen=True)
class EstimatorSpec:
    mode: str = "auto"
    overrides: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Mission:
    """A checked mission file. Optional sections are ``None`` when absent.

    ``satellite`` (the spacecraft the pass belongs to) and ``object_id`` (its catalogue number or
    international designator) come from the optional ``[pass]`` keys of the same names; None when absent.
    """

    path: Path
    pass_id: str
    start: np.datetime64 | None
    stop: np.datetime64 | None
    inertia_kg_m2: np.ndarray
    magnetometer: SensorSpec
    gyro: SensorSpec | None
    coils: CoilSpec | None
    controller: ControllerSpec | None
    orbit: OrbitSpec | None
    estimator: EstimatorSpec
    raw: dict[str, Any] = field(repr=False, default_factory=dict)
    satellite: str | None = None
    object_id: str | None = None
