"""The simulated satellite's onboard magnetic controller and coil drive.

The laws themselves are recon's (:mod:`recon.core.laws`): the simulated flight software and the
judge's replay compute the same thing. The onboard computer works on raw sensor output turned into
body axes with the *nominal* mounting only (no bias, soft-iron or crosstalk correction), as a simple
flight computer does. At each tick it computes a dipole, turns it into coil currents with the nominal
dipole-per-amp matrix, clips each axis at its maximum current and rounds to the drive's 1 uA
resolution; that command is what the coil log records.

References
----------
Stickler, A. C. and Alfriend, K. T. (1974). An elementary magnetic attitude control system.
AIAA paper 74-923 (B-dot: m = -k dB/dt in body axes).
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 7.5 (B-dot and cross-product momentum management).
"""

from __future__ import annotations

import numpy as np

from ..core import bdot_dipole, cross_product_dipole, currents_from_dipole

__all__ = ["bdot_dipole_Am2", "cross_product_dipole_Am2", "currents_from_dipole_A",
           "CURRENT_RESOLUTION_A"]

CURRENT_RESOLUTION_A = 1e-6  # the simulated drive's command step (an invented design value)


def bdot_dipole_Am2(b_now_body_nT: np.ndarray, b_prev_body_nT: np.ndarray, dt_s: float,
                    gain_Am2_s_per_T: float) -> np.ndarray:
    """B-dot dipole ``m = -k dB/dt`` from two consecutive body-frame samples, A m^2 (3,)."""
    return bdot_dipole(b_now_body_nT, b_prev_body_nT, dt_s, gain_Am2_s_per_T)


def cross_product_dipole_Am2(h_body_Nms: np.ndarray, h_target_body_Nms: np.ndarray,
                             b_body_nT: np.ndarray, gain_per_s: float) -> np.ndarray:
    """Cross-product momentum management ``m = k (h_err x B) / |B|^2``, A m^2 (3,)."""
    h_err = np.asarray(h_body_Nms, float) - np.asarray(h_target_body_Nms, float)
    return cross_product_dipole(h_err, b_body_nT, gain_per_s)


def currents_from_dipole_A(m_body_Am2: np.ndarray, dipole_per_amp_nominal: np.ndarray,
                           max_current_A: np.ndarray) -> np.ndarray:
    """Coil command for a wanted dipole: ``i = C_nominal^-1 m``, clipped per axis, rounded to 1 uA."""
    i = currents_from_dipole(m_body_Am2, dipole_per_amp_nominal, max_current_A)
    return np.round(i / CURRENT_RESOLUTION_A) * CURRENT_RESOLUTION_A + 0.0
