"""The measured field's motion in body axes, the relation the gyro checks read.

In body axes the measured field obeys ``db/dt = -(w x b) + A db_ref/dt``; with a gyro reading
``w_g = w + beta`` the kinematic residual ``e = db/dt - A db_ref/dt + w_g x b`` equals ``beta x b =
-[b x] beta`` plus noise.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics) (memory).
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import local_slope, window_mean

__all__ = ["kinematic_residual"]


def kinematic_residual(t_mag: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray,
                       q_body_from_gcrf: np.ndarray, t_gyro: np.ndarray, w_gyro: np.ndarray,
                       half_width_s: float = 1.0) -> np.ndarray:
    """``e = db/dt - A db_ref/dt + w_g x b`` at every magnetometer sample, nT/s, body; NaN where unknown.

    Parameters
    ----------
    t_mag : (N,) s; b_body_nT : (N, 3) nT body; b_ref_nT : (N, 3) nT GCRF
    q_body_from_gcrf : (N, 4) scalar-last, the attitude used for ``A``
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body
    half_width_s : float, half width of the local slope and of the gyro mean, s
    """
    bdot = local_slope(t_mag, b_body_nT, half_width_s)
    rdot = local_slope(t_mag, b_ref_nT, half_width_s)
    a_rdot = Rotation.from_quat(q_body_from_gcrf).apply(np.nan_to_num(rdot))
    a_rdot[~np.all(np.isfinite(rdot), axis=1)] = np.nan
    wg = window_mean(t_gyro, w_gyro, t_mag, half_width_s)
    return bdot - a_rdot + np.cross(wg, b_body_nT)
