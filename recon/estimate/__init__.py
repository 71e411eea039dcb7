"""Attitude and rate reconstruction: multiplicative EKF forward pass and RTS smoother, gyro or dynamics mode."""

from .attitude import estimate_attitude
from .attitude_csv import write_attitude_csv
from .noise import gyro_noise_figures
from .types import AttitudeHistory, FilterStart, GyroAllanFigures, NoiseModel, NoiseSource, OpeningFit, Track

__all__ = [
    "NoiseModel",
    "Track",
    "AttitudeHistory",
    "estimate_attitude",
    "write_attitude_csv",
    "gyro_noise_figures",
    "GyroAllanFigures",
    "NoiseSource",
    "OpeningFit",
    "FilterStart",
]
