"""Attitude and rate reconstruction: multiplicative EKF forward pass and RTS smoother, gyro or dynamics mode."""

from .alignment import AlignmentPrior, AlignmentResult
from .attitude import estimate_attitude
from .coil_torque import CoilTiming
from .dynamics_fit import FilterDiverged
from .noise import gyro_noise_figures
from .types import (
    AttitudeHistory,
    DynamicsModel,
    FilterStart,
    GyroAllanFigures,
    NoiseModel,
    NoiseSource,
    OpeningFit,
    Track,
)

__all__ = [
    "AlignmentPrior",
    "AlignmentResult",
    "NoiseModel",
    "Track",
    "AttitudeHistory",
    "estimate_attitude",
    "FilterDiverged",
    "CoilTiming",
    "DynamicsModel",
    "gyro_noise_figures",
    "GyroAllanFigures",
    "NoiseSource",
    "OpeningFit",
    "FilterStart",
]
