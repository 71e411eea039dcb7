"""A step in the gyro bias, for the estimator: where the filter must let the bias move.

The step is found by :mod:`.gyro_health` without an attitude: the window biases that explain the
field's motion (:mod:`.kinematics`) fit two constant biases, one each side of one boundary, and not
one (:mod:`.pass_bias`); its time is refined to the slope. :func:`find_bias_step` turns that into a
:class:`BiasStep` with the change, its significance per axis and the interval of step times, which
the filter is rerun with (:mod:`.gyro_mode`).

Because the test needs no attitude, an attitude the filter got wrong (a poor opening, a slow pass)
can no longer make a step appear through ``A db_ref/dt``; the attitude argument is kept for the
callers and not used.

References
----------
Basseville, M. and Nikiforov, I. V. (1993). Detection of Abrupt Changes: Theory and Application.
Prentice Hall. Ch. 2 (one change point by maximising a likelihood ratio over its position) (memory).
Birge, R. T. (1932). The calculation of errors by the method of least squares. Phys. Rev. 40(2),
207-227 (the ratio of observed to expected scatter) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import Anomaly, utc_at
from .gyro_health import GyroHealth, assess_gyro
from .pass_bias import STEP_GRID_S

__all__ = ["BiasStep", "find_bias_step", "pooled_bias", "bias_step_from_health"]


def pooled_bias(beta: np.ndarray, info: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Information-weighted mean of window biases and its covariance, scaled by the Birge ratio.

    Parameters
    ----------
    beta : (W, 3) rad/s; info : (W, 3, 3) (rad/s)^-2

    Returns
    -------
    mean : (3,) rad/s; cov : (3, 3) (rad/s)^2; ratio : float, max(1, chi2 / (3 (W - 1)))
    """
    total = info.sum(axis=0)
    cov = np.linalg.inv(total)
    mean = cov @ np.einsum("wij,wj->i", info, beta)
    d = beta - mean
    chi2 = float(np.einsum("wi,wij,wj->", d, info, d))
    dof = 3 * (len(beta) - 1)
    ratio = max(1.0, chi2 / dof) if dof > 0 else 1.0
    return mean, cov * ratio, ratio


@dataclass(frozen=True)
class BiasStep:
    """A step in the gyro bias.

    Attributes
    ----------
    t_s : float, time of the step (s since the epoch)
    t_lo_s, t_hi_s : float, interval of step times that fit nearly as well (s since the epoch)
    delta_rad_s : (3,) change of bias, rad/s, body frame
    z : (3,) significance per axis (change over its 1-sigma)
    before_rad_s, after_rad_s : (3,) pooled kinematic bias on each side, rad/s
    window_s : float
    """

    t_s: float
    t_lo_s: float
    t_hi_s: float
    delta_rad_s: np.ndarray
    z: np.ndarray
    before_rad_s: np.ndarray
    after_rad_s: np.ndarray
    window_s: float

    def anomaly(self, t_epoch_ns: int) -> Anomaly:
        ax = int(np.argmax(np.abs(self.z)))
        d = np.rad2deg(self.delta_rad_s)
        t = utc_at(t_epoch_ns, self.t_s)
        return Anomaly("gyro_bias_jump", "warning",
                       f"gyro bias stepped by ({d[0]:+.3f}, {d[1]:+.3f}, {d[2]:+.3f}) deg/s (body x, y, z) "
                       f"at {np.datetime_as_string(t, unit='s')}Z (between {self.t_lo_s - self.t_s:+.1f} and "
                       f"{self.t_hi_s - self.t_s:+.1f} s of it): kinematic bias from gyro versus field motion "
                       f"{np.rad2deg(self.before_rad_s[ax]):+.3f} deg/s before and "
                       f"{np.rad2deg(self.after_rad_s[ax]):+.3f} deg/s after on axis {'xyz'[ax]} "
                       f"({abs(self.z[ax]):.0f} sigma, {self.window_s:.0f} s windows). The filter was rerun with "
                       f"the bias free to move there.",
                       utc_at(t_epoch_ns, self.t_lo_s), utc_at(t_epoch_ns, self.t_hi_s), axis="xyz"[ax],
                       value=float(d[ax]))


def bias_step_from_health(health: GyroHealth) -> BiasStep | None:
    """The :class:`BiasStep` of a gyro health verdict "bias_step" (None otherwise)."""
    st = health.step
    if health.health != "bias_step" or st is None:
        return None
    delta = st.after_rad_s - st.before_rad_s
    sigma = np.sqrt(np.clip(np.diag(st.cov_before) + np.diag(st.cov_after), 1e-30, None))
    return BiasStep(st.t_s, st.t_lo_s, st.t_hi_s, delta, delta / sigma, st.before_rad_s, st.after_rad_s, STEP_GRID_S)


def find_bias_step(t_mag: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray, q_body_from_gcrf: np.ndarray | None,
                   t_gyro: np.ndarray, w_gyro: np.ndarray, bias_walk_rad_s_sqrt_s: float, *,
                   mag_noise_nT: float | None = None, gyro_arw_rad_sqrt_s: float | None = None,
                   full_scale_rad_s: float | None = None, field_steps_s: np.ndarray | None = None) -> BiasStep | None:
    """Look for one step in the gyro bias (see :func:`.gyro_health.assess_gyro`).

    Parameters
    ----------
    t_mag : (N,) s; b_body_nT : (N, 3) nT body; b_ref_nT : (N, 3) nT, reference field (GCRF)
    q_body_from_gcrf : unused (the test needs no attitude); kept for the callers
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body
    bias_walk_rad_s_sqrt_s : float, rate random walk of the bias
    mag_noise_nT, gyro_arw_rad_sqrt_s : noise levels (None: from the data); full_scale_rad_s : gyro range
    field_steps_s : the control ticks when the magnetometer samples with the coils on, or None

    Returns
    -------
    BiasStep or None
    """
    health = assess_gyro(t_gyro, w_gyro, t_mag, b_body_nT, b_ref_nT, mag_noise_nT=mag_noise_nT,
                         gyro_arw_rad_sqrt_s=gyro_arw_rad_sqrt_s, full_scale_rad_s=full_scale_rad_s,
                         field_steps_s=field_steps_s, bias_walk_rad_s_sqrt_s=bias_walk_rad_s_sqrt_s)
    return bias_step_from_health(health)
