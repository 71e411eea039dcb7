"""The simulated satellite's onboard magnetic controller and coil drive.

The onboard computer works on raw sensor output turned into body axes with the *nominal* mounting
only (no bias, soft-iron or crosstalk correction), as a simple flight computer does. At each tick it
computes a dipole, turns it into coil currents with the nominal dipole-per-amp matrix, clips each
axis at its maximum current and rounds to the drive's 1 uA resolution; that command is what the
coil log records.

References
----------
Stickler, A. C. and Alfriend, K. T. (1974). An elementary magnetic attitude control system.
AIAA paper 74-923 (B-dot: m = -k dB/dt in body axes).
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 7.5 (B-dot and cross-product momentum management).
"""

from __future__ import annotations

import numpy as np

__all__ = ["bdot_dipole_Am2", "cross_product_dipole_Am2", "currents_from_dipole_A",
           "CURRENT_RESOLUTION_A"]

CURRENT_RESOLUTION_A = 1e-6  # the simulated drive's command step (an invented design value)


def bdot_dipole_Am2(b_now_body_nT: np.ndarray, b_prev_body_nT: np.ndarray, dt_s: float,
                    gain_Am2_s_per_T: float) -> np.ndarray:
    """B-dot dipole ``m = -k dB/dt`` from two consecutive body-frame samples.

    Parameters
    ----------
    b_now_body_nT, b_prev_body_nT : (3,) nT, body frame
    dt_s : float, time between the samples, s
    gain_Am2_s_per_T : float, k in A m^2 s / T

    Returns
    -------
    (3,) A m^2, body frame
    """
    bdot_T_s = (np.asarray(b_now_body_nT, float) - np.asarray(b_prev_body_nT, float)) * 1e-9 / dt_s
    return -gain_Am2_s_per_T * bdot_T_s


def cross_product_dipole_Am2(h_body_Nms: np.ndarray, h_target_body_Nms: np.ndarray,
                             b_body_nT: np.ndarray, gain_per_s: float) -> np.ndarray:
    """Cross-product momentum management ``m = k (h_err x B) / |B|^2``.

    The resulting torque is ``-k (h_err - (h_err . b_hat) b_hat)``: the part of the momentum error
    across the field decays at rate k.

    Parameters
    ----------
    h_body_Nms, h_target_body_Nms : (3,) N m s, body frame
    b_body_nT : (3,) nT, body frame
    gain_per_s : float, k in 1/s

    Returns
    -------
    (3,) A m^2, body frame
    """
    b_T = np.asarray(b_body_nT, float) * 1e-9
    b2 = float(b_T @ b_T)
    if b2 == 0.0:
        return np.zeros(3)
    h_err = np.asarray(h_body_Nms, float) - np.asarray(h_target_body_Nms, float)
    return gain_per_s * np.cross(h_err, b_T) / b2


def currents_from_dipole_A(m_body_Am2: np.ndarray, dipole_per_amp_nominal: np.ndarray,
                           max_current_A: np.ndarray) -> np.ndarray:
    """Coil command for a wanted dipole: ``i = C_nominal^-1 m``, clipped per axis, rounded to 1 uA."""
    i = np.linalg.solve(dipole_per_amp_nominal, np.asarray(m_body_Am2, float))
    i = np.clip(i, -max_current_A, max_current_A)
    return np.round(i / CURRENT_RESOLUTION_A) * CURRENT_RESOLUTION_A + 0.0
