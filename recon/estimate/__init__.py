"""Attitude and rate reconstruction: multiplicative EKF forward pass and RTS smoother, gyro or dynamics mode."""

from .attitude import (
    AttitudeHistory,
    NoiseModel,
    Track,
    estimate_attitude,
    gyro_noise_figures,
    write_attitude_csv,
)

__all__ = [
    "NoiseModel",
    "Track",
    "AttitudeHistory",
    "estimate_attitude",
    "write_attitude_csv",
    "gyro_noise_figures",
]
