"""Attitude and rate reconstruction: multiplicative EKF forward pass and RTS smoother, gyro or dynamics mode."""

from .attitude import estimate_attitude
from .noise import gyro_noise_figures
from .types import AttitudeHistory, FilterStart, GyroAllanFigures, NoiseModel, NoiseSource, OpeningFit, Track

__all__ = [
    "NoiseModel",
    "Track",
    "AttitudeHistory",
    "estimate_attitude",
    "gyro_noise_figures",
    "GyroAllanFigures",
    "NoiseSource",
    "OpeningFit",
    "FilterStart",
]
