"""attitude.csv: the smoothed attitude history of a pass as a plain table, one row per magnetometer
time stamp."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..estimate import AttitudeHistory

__all__ = ["write_attitude_csv"]


def write_attitude_csv(path: str | Path, hist: AttitudeHistory) -> Path:
    """Write attitude.csv: time_utc, qx, qy, qz, qw (q_body_from_gcrf), rate_x/y/z_dps (body),
    bias_x/y/z_dps, sigma_x/y/z_deg (1-sigma attitude error about each body axis), smoothed."""
    path = Path(path)
    q = hist.q_body_from_gcrf
    w = np.rad2deg(hist.w_body_rad_s)
    b = np.rad2deg(hist.gyro_bias_rad_s)
    s = np.rad2deg(hist.sigma_att_rad)
    df = pd.DataFrame({
        "time_utc": np.datetime_as_string(hist.time_utc.astype("datetime64[us]"), unit="us"),
        "qx": q[:, 0], "qy": q[:, 1], "qz": q[:, 2], "qw": q[:, 3],
        "rate_x_dps": w[:, 0], "rate_y_dps": w[:, 1], "rate_z_dps": w[:, 2],
        "bias_x_dps": b[:, 0], "bias_y_dps": b[:, 1], "bias_z_dps": b[:, 2],
        "sigma_x_deg": s[:, 0], "sigma_y_deg": s[:, 1], "sigma_z_deg": s[:, 2],
    })
    df["time_utc"] = df["time_utc"] + "Z"
    df.to_csv(path, index=False, float_format="%.9g")
    return path
