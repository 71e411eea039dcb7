"""The mission file: read a TOML file, check every key and return a :class:`Mission` of typed specs.

Every problem raises :class:`recon.core.InputError` naming the file, the dotted key, what was
expected and what was found. Other packages import from here only (``from ..config import Mission``).
"""

from .mission import load_mission
from .reader import parse_utc
from .specs import (
    CoilSpec,
    ControllerSpec,
    EstimatorSpec,
    Mission,
    OrbitSpec,
    PositionsSpec,
    SensorSpec,
    TimeSpec,
)

__all__ = [
    "TimeSpec", "SensorSpec", "CoilSpec", "ControllerSpec", "PositionsSpec", "OrbitSpec",
    "EstimatorSpec", "Mission", "load_mission", "parse_utc",
]
