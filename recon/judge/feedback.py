"""Crosstalk feedback: the loop gain of the coils' own field through B-dot's derivative, and a
B-dot replay with that field taken out of the magnetometer samples.

References
----------
Franklin, G. F., Powell, J. D. and Workman, M. L. (1998). Digital Control of Dynamic Systems,
3rd ed., ch. 7 (stability of difference equations; gain margin).
"""

from __future__ import annotations

import numpy as np

from .replay import chatter_fraction, replay_bdot_A
from .types import CrosstalkFeedback

__all__ = ["crosstalk_loop_gain", "assess_crosstalk_feedback"]


def _companion(G: np.ndarray, delay_ticks: int) -> np.ndarray:
    """State matrix of i_k = -G i_{k-1-d} + G i_{k-2-d} with state (i_{k-1}, ..., i_{k-2-d})."""
    n = 3 * (delay_ticks + 2)
    A = np.zeros((n, n))
    A[0:3, 3 * delay_ticks:3 * delay_ticks + 3] = -G
    A[0:3, 3 * (delay_ticks + 1):3 * (delay_ticks + 2)] = G
    A[3:, :-3] = np.eye(n - 3)
    return A


def crosstalk_loop_gain(K_body_nT_per_A: np.ndarray, C_nominal: np.ndarray, gain_Am2_s_per_T: float,
                        period_s: float, *, delay_ticks: int = 0) -> tuple[float, float]:
    """Loop gain of the feedback from the coils' own field into B-dot's derivative.

    Derivation. With the magnetometer seeing the coils, the tick sample is
    ``b_k = B_k + K_body i_{k-1-d}`` (the current flowing at the sample is the command of the
    previous tick, or of ``d`` ticks earlier with an actuation delay of d whole periods). B-dot
    commands, below saturation, ``i_k = -C^-1 k (b_k - b_{k-1}) / T * 1e-9`` (nT -> T). Leaving out
    the external field's own change, the coil currents obey the linear recurrence::

        i_k = -G (i_{k-1-d} - i_{k-2-d}),      G = (k / T) 1e-9 C_nominal^-1 K_body

    whose open-loop transfer is ``L(z) = -G (z^-1 - z^-2) z^-d``. At the period-two frequency
    (z = -1, currents flipping sign every tick) ``L(-1) = 2 G`` for d = 0: a flip of amplitude a
    changes the sampled coil field by ``2 K a`` per tick, which commands ``2 G a``. The loop is
    unstable when the recurrence's state matrix has spectral radius >= 1; for one axis with a
    positive coupling g that happens at g = 1/2 (roots of z^2 + g z - g = 0 reach z = -1), for a
    negative one at |g| = 1 (a slower, complex pair). Saturation then turns the growing
    oscillation into limit-to-limit chatter.

    The loop gain returned is the reciprocal of the gain margin: the factor by which G would have
    to be divided to bring the loop to the edge of stability, so that a loop gain >= 1 means the
    coil-field loop oscillates. For one axis with g > 0 and d = 0 it equals 2 g.

    Parameters
    ----------
    K_body_nT_per_A : (3, 3) crosstalk in body axes: nT of sensed field (body axes) per A of coil
        current, ``K_body = sensor_to_body @ K_sensor``
    C_nominal : (3, 3) A m^2 per A
    gain_Am2_s_per_T : float, B-dot gain k
    period_s : float, control period T
    delay_ticks : int, whole control periods of actuation delay

    Returns
    -------
    loop_gain : float (0 when the loop cannot be destabilised by any scaling up to 1000)
    coupling : float, spectral radius of G (the single-step coil-field coupling)

    References
    ----------
    Franklin, G. F., Powell, J. D. and Workman, M. L. (1998). Digital Control of Dynamic Systems,
    3rd ed., ch. 7 (stability of difference equations; gain margin).
    """
    K = np.asarray(K_body_nT_per_A, float)
    G = gain_Am2_s_per_T / period_s * 1e-9 * np.linalg.solve(np.asarray(C_nominal, float), K)
    coupling = float(np.max(np.abs(np.linalg.eigvals(G))))
    if coupling == 0.0:
        return 0.0, 0.0

    def rho(s: float) -> float:
        return float(np.max(np.abs(np.linalg.eigvals(_companion(s * G, delay_ticks)))))

    s_grid = np.logspace(-3, 3, 241) / coupling
    r = np.array([rho(s) for s in s_grid])
    above = np.nonzero(r >= 1.0)[0]
    if len(above) == 0:
        return 0.0, coupling
    j = above[0]
    if j == 0:
        return float(1.0 / s_grid[0]), coupling
    lo, hi = s_grid[j - 1], s_grid[j]
    for _ in range(60):
        mid = np.sqrt(lo * hi)
        if rho(mid) >= 1.0:
            hi = mid
        else:
            lo = mid
    return float(1.0 / hi), coupling


def assess_crosstalk_feedback(K_sensor_nT_per_A: np.ndarray, mag_sensor_to_body: np.ndarray,
                              C_nominal: np.ndarray, gain_Am2_s_per_T: float, period_s: float, *,
                              ticks_s: np.ndarray, b_tick_body_nT: np.ndarray, i_seen_at_tick_A: np.ndarray,
                              max_current_A: np.ndarray, delay_ticks: int = 0) -> CrosstalkFeedback:
    """Loop gain of the coil-field feedback and a B-dot replay with the coils' field taken out.

    Parameters
    ----------
    K_sensor_nT_per_A : (3, 3) crosstalk, nT (sensor axes) per A of coil current
    mag_sensor_to_body : (3, 3) M, v_body = M v_sensor; the crosstalk in body axes is ``M K``
    C_nominal : (3, 3); gain_Am2_s_per_T : float; period_s : float
    ticks_s : (K,) s; b_tick_body_nT : (K, 3) the tick samples, nT body axes
    i_seen_at_tick_A : (K, 3) the coil current flowing when each tick sample was taken (zero when the
        magnetometer is shielded from the coils), A
    max_current_A : (3,)
    delay_ticks : int, whole periods of actuation delay

    Returns
    -------
    CrosstalkFeedback
    """
    K_body = np.asarray(mag_sensor_to_body, float) @ np.asarray(K_sensor_nT_per_A, float)
    lg, coupling = crosstalk_loop_gain(K_body, C_nominal, gain_Am2_s_per_T, period_s, delay_ticks=delay_ticks)
    clean = np.asarray(b_tick_body_nT, float) - np.nan_to_num(np.asarray(i_seen_at_tick_A, float)) @ K_body.T
    i_clean = replay_bdot_A(ticks_s, clean, gain_Am2_s_per_T, C_nominal, max_current_A)
    return CrosstalkFeedback(lg, coupling, K_body, chatter_fraction(i_clean, max_current_A))
