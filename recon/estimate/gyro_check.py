"""Is the gyro alive? The estimator's view of the gyro's health (:mod:`.gyro_health`).

:func:`check_gyro` runs the health tests and says whether the filter may use the gyro: a gyro found
dead is not used (anomaly ``gyro_dead``, dynamics mode, :mod:`.dynamics_mode`); one with a bias step
is used with the bias free to move at the step (:mod:`.bias_step`, :mod:`.gyro_mode`); one the
field's motion cannot test ("untestable") is used, the health saying why it was not tested.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core import RAD_PER_DEG, Anomaly, utc_at
from .gyro_health import GyroHealth, assess_gyro

__all__ = ["GyroCheck", "check_gyro"]


@dataclass(frozen=True)
class GyroCheck:
    """Verdict on the gyro log.

    Attributes
    ----------
    usable : bool, the filter may use the gyro (health other than "dead")
    reason : str, one sentence with the numbers
    dead_start_s, dead_stop_s : float or None, window where the gyro is dead (s since the epoch)
    axis : int or None
    explained_fraction : float or None, kept for the callers (no longer computed: see ``health``)
    health : GyroHealth or None, the tests' verdict and figures (its ``to_summary()`` is the
        summary's "gyro" block)
    """

    usable: bool
    reason: str
    dead_start_s: float | None = None
    dead_stop_s: float | None = None
    axis: int | None = None
    explained_fraction: float | None = None
    health: GyroHealth | None = None

    def anomaly(self, t_epoch_ns: int, dynamics_used: bool = True) -> Anomaly:
        start = None if self.dead_start_s is None else utc_at(t_epoch_ns, self.dead_start_s)
        stop = None if self.dead_stop_s is None else utc_at(t_epoch_ns, self.dead_stop_s)
        what = (" Attitude reconstructed without the gyro (dynamics mode)." if dynamics_used else
                " The gyro was used anyway because gyro mode was requested: treat the attitude with caution.")
        return Anomaly("gyro_dead", "critical", self.reason + what, start, stop,
                       axis=None if self.axis is None else "xyz"[self.axis],
                       value=None if self.health is None else self.health.power)

    def to_summary(self) -> dict[str, Any]:
        """The "gyro" block of summary.json (``health`` = ok | dead | bias_step | untestable)."""
        if self.health is not None:
            return self.health.to_summary()
        return {"health": "ok" if self.usable else "dead", "reason": self.reason}


def check_gyro(t_gyro: np.ndarray, w_gyro: np.ndarray, t_mag: np.ndarray, b_body_nT: np.ndarray,
               arw_rad_sqrt_s: float | None, *, b_ref_nT: np.ndarray | None = None, mag_noise_nT: float | None = None,
               bias0_sigma_rad_s: float = 0.5 * RAD_PER_DEG, full_scale_rad_s: float | None = None,
               field_steps_s: np.ndarray | None = None,
               bias_walk_rad_s_sqrt_s: float | None = None) -> GyroCheck:
    """Is the gyro alive? See :func:`.gyro_health.assess_gyro` for the tests.

    Parameters
    ----------
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body; t_mag : (N,) s; b_body_nT : (N, 3) nT body
    arw_rad_sqrt_s : float or None, stated angle random walk (None: from the data)
    b_ref_nT : (N, 3) nT, the reference field at the magnetometer samples (any inertial frame); without
        it the field's own turn is taken as twice the orbital rate (a weaker test)
    mag_noise_nT : magnetometer white noise, nT (None: from the data)
    bias0_sigma_rad_s : 1-sigma of the gyro's turn-on bias
    full_scale_rad_s : the gyro's range (samples at it are clipped, not stuck), or None
    field_steps_s : (S,) s, the control ticks when the magnetometer samples with the coils on (its field
        steps there), or None
    bias_walk_rad_s_sqrt_s : the bias's rate random walk, or None (a MEMS default)
    """
    health = assess_gyro(t_gyro, w_gyro, t_mag, b_body_nT, b_ref_nT, mag_noise_nT=mag_noise_nT,
                         gyro_arw_rad_sqrt_s=arw_rad_sqrt_s, bias0_sigma_rad_s=bias0_sigma_rad_s,
                         full_scale_rad_s=full_scale_rad_s, field_steps_s=field_steps_s,
                         **({} if bias_walk_rad_s_sqrt_s is None
                            else {"bias_walk_rad_s_sqrt_s": bias_walk_rad_s_sqrt_s}))
    return GyroCheck(health.health != "dead", health.reason, health.dead_start_s, health.dead_stop_s, health.axis,
                     None, health)
