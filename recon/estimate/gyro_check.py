"""Is the gyro alive? The verdict on a gyro log, from its own output and from the measured field.

Gyro checks use the kinematics of the measured field (:mod:`.kinematics`): with a gyro reading
``w_g = w + beta`` the residual ``db/dt + w_g x b - A db_ref/dt = beta x b`` must be explained by a
small, nearly constant bias. A gyro stuck at one value, or at zero, or whose output does not follow
the field's motion is declared dead (anomaly ``gyro_dead``) and the pass is reconstructed in
dynamics mode (:mod:`.dynamics_mode`). A step in the bias of a live gyro is found in :mod:`.bias_step`.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics).
Savitzky, A. and Golay, M. J. E. (1964). Smoothing and differentiation of data by simplified least
squares procedures. Anal. Chem. 36(8), 1627-1639 (the local-slope derivative) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import RAD_PER_DEG, Anomaly, cross_matrices, local_slope, utc_at, white_noise_from_differences, window_mean

__all__ = ["GyroCheck", "check_gyro"]


def _longest_constant_run(t: np.ndarray, x: np.ndarray) -> tuple[float, float, int]:
    """Longest time span over which column values do not change: (start_s, stop_s, axis)."""
    best = (0.0, 0.0, -1)
    for ax in range(x.shape[1]):
        same = np.diff(x[:, ax]) == 0.0
        if not same.any():
            continue
        edges = np.diff(np.r_[0, same.astype(np.int8), 0])
        starts = np.nonzero(edges == 1)[0]
        stops = np.nonzero(edges == -1)[0]  # run covers samples starts..stops (inclusive)
        span = t[stops] - t[starts]
        k = int(np.argmax(span))
        if span[k] > best[1] - best[0]:
            best = (float(t[starts[k]]), float(t[stops[k]]), ax)
    return best


@dataclass(frozen=True)
class GyroCheck:
    """Verdict on the gyro log.

    Attributes
    ----------
    usable : bool
    reason : str, one sentence with the numbers
    dead_start_s, dead_stop_s : float or None, window where the gyro is dead (s since the epoch)
    axis : int or None
    explained_fraction : float or None
        Fraction of the field's body-frame rate of change explained by the gyro (1 for a perfect
        gyro, about 0 for a dead one); None when the satellite barely turns.
    """

    usable: bool
    reason: str
    dead_start_s: float | None = None
    dead_stop_s: float | None = None
    axis: int | None = None
    explained_fraction: float | None = None

    def anomaly(self, t_epoch_ns: int, dynamics_used: bool = True) -> Anomaly:
        start = None if self.dead_start_s is None else utc_at(t_epoch_ns, self.dead_start_s)
        stop = None if self.dead_stop_s is None else utc_at(t_epoch_ns, self.dead_stop_s)
        what = (" Attitude reconstructed without the gyro (dynamics mode)." if dynamics_used else
                " The gyro was used anyway because gyro mode was requested: treat the attitude with caution.")
        return Anomaly("gyro_dead", "critical", self.reason + what, start, stop,
                       axis=None if self.axis is None else "xyz"[self.axis], value=self.explained_fraction)


def check_gyro(t_gyro: np.ndarray, w_gyro: np.ndarray, t_mag: np.ndarray, b_body_nT: np.ndarray,
               arw_rad_sqrt_s: float | None, *, stuck_min_s: float = 30.0, stuck_min_fraction: float = 0.1,
               window_s: float = 60.0, max_bias_rad_s: float = 2.0 * RAD_PER_DEG,
               min_explained: float = 0.5, noise_factor: float = 20.0) -> GyroCheck:
    """Is the gyro alive? Three tests, any one failing makes it dead.

    1. Stuck: one axis repeats exactly the same value for at least ``stuck_min_s`` and
       ``stuck_min_fraction`` of the log (a live gyro's noise never repeats that long).
    2. Kinematics: over ``window_s`` windows where the body field turns faster than the orbit alone
       can turn it (|db/dt| > 3 x 0.0025 rad/s x |b|, i.e. three times twice the orbital rate), the
       gyro, less a constant bias of at most ``max_bias_rad_s``, must explain at least
       ``min_explained`` of the variance of db/dt.
    3. Noise: the per-sample white noise exceeds ``noise_factor`` times the stated ARW (output is
       noise), tested only when test 2 has no informative window.

    Thresholds are engineering choices (common practice, no source) with wide margins: a healthy
    gyro explains more than 90 % of db/dt when the satellite turns faster than 0.5 deg/s.

    Parameters
    ----------
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body; t_mag : (N,) s; b_body_nT : (N, 3) nT body
    arw_rad_sqrt_s : float or None, stated angle random walk
    """
    span = float(t_gyro[-1] - t_gyro[0])
    s0, s1, ax = _longest_constant_run(t_gyro, w_gyro)
    if ax >= 0 and (s1 - s0) >= max(stuck_min_s, stuck_min_fraction * span):
        value = float(w_gyro[np.searchsorted(t_gyro, s0), ax])
        return GyroCheck(False, f"gyro axis {'xyz'[ax]} repeats the same output {np.rad2deg(value):.4g} deg/s "
                                f"for {s1 - s0:.0f} s ({100 * (s1 - s0) / span:.0f} % of the log): stuck or dead.",
                         s0, float(t_gyro[-1]) if s1 >= t_gyro[-1] - 1.0 else s1, ax, None)
    # kinematic test
    bdot = local_slope(t_mag, b_body_nT, 1.0)
    wg = window_mean(t_gyro, w_gyro, t_mag, 1.0)
    ok = np.all(np.isfinite(bdot), axis=1)
    bmag = np.linalg.norm(b_body_nT, axis=1)
    floor = 3.0 * 0.0025 * bmag  # three times the field's own turning rate in a polar LEO
    fast = ok & (np.linalg.norm(bdot, axis=1) > floor)
    explained = None
    if fast.sum() >= 50:
        e = bdot[fast] + np.cross(wg[fast], b_body_nT[fast])
        # e = beta x b = -[b x] beta: least squares for a constant bias
        bx = cross_matrices(b_body_nT[fast])
        beta, *_ = np.linalg.lstsq(-bx.reshape(-1, 3), e.ravel(), rcond=None)
        res = e + np.einsum("nij,j->ni", bx, beta)
        explained = float(1.0 - np.sum(res ** 2) / np.sum(bdot[fast] ** 2))
        bad_bias = np.linalg.norm(beta) > max_bias_rad_s
        if explained < min_explained or bad_bias:
            tf = t_mag[fast]
            frac_res = np.linalg.norm(res, axis=1) / np.linalg.norm(bdot[fast], axis=1)
            badw = tf[frac_res > 0.7]
            start = float(badw[0]) if len(badw) else float(tf[0])
            stop = float(badw[-1]) if len(badw) else float(tf[-1])
            why = (f"a bias of {np.rad2deg(np.linalg.norm(beta)):.2f} deg/s would be needed" if bad_bias else
                   f"the gyro explains only {100 * max(explained, 0.0):.0f} % of the field's body-frame rate "
                   f"of change (expected > {100 * min_explained:.0f} %)")
            return GyroCheck(False, f"gyro output does not follow the measured field's motion: {why}, over "
                                    f"{fast.sum()} samples where the satellite turns.", start, stop, None,
                             explained)
        return GyroCheck(True, f"gyro consistent with the magnetometer: explains {100 * explained:.1f} % of "
                               f"the field's body-frame rate of change.", explained_fraction=explained)
    if arw_rad_sqrt_s:
        dt = float(np.median(np.diff(t_gyro)))
        white = white_noise_from_differences(w_gyro)
        expected = arw_rad_sqrt_s / np.sqrt(dt)
        if white > noise_factor * expected:
            return GyroCheck(False, f"gyro white noise {np.rad2deg(white):.3g} deg/s per sample is "
                                    f"{white / expected:.0f} times the stated angle random walk allows, and the "
                                    f"satellite turns too slowly to test the output against the field.",
                             float(t_gyro[0]), float(t_gyro[-1]))
    return GyroCheck(True, "gyro not stuck; the satellite turns too slowly for a kinematic test.")
