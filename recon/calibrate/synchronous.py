"""Coil crosstalk by synchronous detection of the duty cycle: each sample taken with the coils on,
against the sample taken with them off that follows it.

With ``mag_sampling = "windowed"`` the coils are switched off around every control tick, so the
magnetometer's own samples alternate between readings of the field alone (inside the off windows)
and readings of the field plus the coil field ``K i`` (outside). A sample ``j`` taken with the coils
on, less the off sample ``b`` that follows it turned into ``j``'s axes by the gyro,

    m_j - R m_b = K i_j + (nuisances) + n_j - R n_b,

measures ``K i_j`` directly as a vector, whether or not the current changes from one period to the
next (the step estimate, :mod:`recon.calibrate.steps`, needs it to change; the magnitude fit needs the
dipole to have a part along the field). With ``"coils_on"`` there are no off samples: the samples on
both sides of a current step play their part, which is the step estimate. The regression, its
nuisances and its covariance are :mod:`recon.calibrate.differences`, here with the gyro's scale and
axis errors too (the two samples are up to a period apart).

Why the off sample *after* ``j`` and not the mean of the two around it: the onboard controller reads
the off sample at the tick that starts ``j``'s period to compute ``i_j`` (B-dot from its difference
with the one before), so that sample's noise drives ``i_j``; a regressor correlated with its own noise
biases least squares (the errors-in-variables problem of closed-loop identification; Ljung 1999,
System Identification, 2nd ed., sec. 13.4). For B-dot at 2.7e-5 A per nT of noise (gain 40,000
A m^2 s/T, 1.5 A m^2/A, one-second ticks) and 100 nT noise the bias of the two-sided difference is
about ``0.5 x 2.7e-5 x 100^2 / var(i)``, some 300 nT/A at 20 mA rms. The off sample after ``j`` was
read for the *next* command, which ``j`` does not see. The price: that sample alone stands for the
field, and the field's turn and its own change are removed over up to a period instead of cancelling
between two neighbours, so the gyro's errors and the field's rate enter as nuisance columns.

Which samples: an on sample at least ``SETTLE_s`` after the tick that commanded its current (the drive
may take that long to establish it), whose period ends in an off sample with the gyro running
throughout.

References
----------
Ljung, L. (1999). System Identification: Theory for the User, 2nd ed. Prentice Hall, chapter 13.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation, Slerp

from .differences import PairSet, fit_differences
from .model import AXES, crosstalk_name

__all__ = ["SynchronousFit", "fit_crosstalk_synchronous", "SETTLE_s", "MIN_PERIODS", "GYRO_GAP_FACTOR"]

# On samples closer than this to the tick that commanded their current are not used: a drive takes
# tens to about 150 ms from command to current (common practice, no source).
SETTLE_s = 0.2
# A coil's crosstalk column needs a non-zero current in at least this many control periods (common
# practice, no source).
MIN_PERIODS = 5
# A gyro interval longer than this multiple of the median is a gap: no pair spans it.
GYRO_GAP_FACTOR = 1.5


@dataclass(frozen=True)
class SynchronousFit:
    """Crosstalk from the on/off samples of windowed sampling.

    Attributes
    ----------
    crosstalk_nT_per_A : (3, 3) array, nT per A, sensor axes x coils; NaN where undetermined
    sigma_nT_per_A : (3, 3) array, 1 sigma; NaN where undetermined
    covariance : (9, 9) array, row-major order of K; NaN rows/columns where undetermined
    undetermined : dict
        ``crosstalk_<axis>_coil_<coil>`` -> reason.
    n_periods : (3,) int array
        Control periods in which each coil carried a current, among those used.
    noise_nT : float
        Magnetometer noise per axis (1 sigma) estimated from the residuals.
    n_pairs, n_rejected : int
    """

    crosstalk_nT_per_A: np.ndarray
    sigma_nT_per_A: np.ndarray
    covariance: np.ndarray
    undetermined: dict[str, str]
    n_periods: np.ndarray
    noise_nT: float
    n_pairs: int
    n_rejected: int


def fit_crosstalk_synchronous(t_s: np.ndarray, m_sensor_nT: np.ndarray, i_coil_A: np.ndarray, off: np.ndarray,
                              ticks_s: np.ndarray, gyro_t_s: np.ndarray, w_sensor_rad_s: np.ndarray, *,
                              block_s: float = 30.0, settle_s: float = SETTLE_s,
                              min_periods: int = MIN_PERIODS) -> SynchronousFit:
    """Estimate the crosstalk K from the samples taken with the coils on against those taken off.

    Parameters
    ----------
    t_s : (N,) array, s
        Magnetometer sample times (increasing, any origin shared with ``ticks_s`` and ``gyro_t_s``).
    m_sensor_nT : (N, 3) array, nT, sensor axes
        Measured field; rows with NaN are not used.
    i_coil_A : (N, 3) array, A
        The current each sample saw (zero inside the off windows); NaN rows are not used.
    off : (N,) bool array
        Samples inside an off window (the coils off).
    ticks_s : (K,) array, s
        Control ticks, increasing.
    gyro_t_s : (G,) array, s; w_sensor_rad_s : (G, 3) array, rad/s, magnetometer sensor axes
        The gyro's body rate in the magnetometer's axes (``M^T w_body``); NaN rows (clipped) are gaps.
    block_s : float
        Length of the blocks over which the field's inertial rate is taken constant, s.
    settle_s, min_periods : float, int
        See the module constants.

    Returns
    -------
    SynchronousFit
    """
    t = np.asarray(t_s, dtype=float)
    m = np.asarray(m_sensor_nT, dtype=float)
    i = np.asarray(i_coil_A, dtype=float)
    off = np.asarray(off, dtype=bool)
    ticks = np.asarray(ticks_s, dtype=float)
    on, after, period = _on_samples(t, m, i, off, ticks, settle_s)
    track = _GyroTrack.from_rates(np.asarray(gyro_t_s, float), np.asarray(w_sensor_rad_s, float))
    on &= track.covers(t, after)
    n_periods, coils, undetermined = _periods_per_coil(i, on, period, min_periods)
    if not np.any(coils):
        nan33 = np.full((3, 3), np.nan)
        return SynchronousFit(nan33, nan33.copy(), np.full((9, 9), np.nan), undetermined, n_periods, np.nan,
                              int(on.sum()), 0)
    pairs = _pairs(t, m, i, np.flatnonzero(on), after, track, block_s)
    fit = fit_differences(pairs, coils, gyro_scale=True)
    return SynchronousFit(fit.crosstalk_nT_per_A, fit.sigma_nT_per_A, fit.covariance, undetermined, n_periods,
                          fit.noise_nT, fit.n_pairs, fit.n_rejected)


def _on_samples(t, m, i, off, ticks, settle_s):
    """Which samples can be used as coils-on samples (N,) bool, the off sample after each (N,) int
    (-1: none), and each sample's period (N,) int (index of the tick before it)."""
    n = len(t)
    ok = np.all(np.isfinite(m), axis=1)
    period = np.searchsorted(ticks, t, side="right") - 1
    off_idx = np.flatnonzero(off & ok)
    nxt = np.searchsorted(off_idx, np.arange(n), side="right")
    after = np.where(nxt < len(off_idx), off_idx[np.minimum(nxt, len(off_idx) - 1)], -1)
    on = ok & ~off & np.all(np.isfinite(i), axis=1) & (period >= 0) & (after >= 0)
    since = t - ticks[np.clip(period, 0, max(len(ticks) - 1, 0))] if len(ticks) else np.zeros(n)
    on &= since >= settle_s
    # the off sample must belong to the window of the next tick: the same period, then its end
    next_tick = ticks[np.clip(period + 1, 0, max(len(ticks) - 1, 0))] if len(ticks) else np.zeros(n)
    half = 0.5 * float(np.median(np.diff(ticks))) if len(ticks) > 1 else np.inf
    on &= (period + 1 < len(ticks)) & (np.abs(t[np.maximum(after, 0)] - next_tick) < half)
    return on, after, period


def _periods_per_coil(i, on, period, min_periods):
    """Periods in which each coil carried a current (3,), which coils have enough (3,) bool, and the
    reasons for the crosstalk columns of the others."""
    n_periods = np.array([len(np.unique(period[on & (i[:, c] != 0)])) if np.any(on) else 0 for c in range(3)])
    coils = n_periods >= min_periods
    undetermined: dict[str, str] = {}
    for c in np.flatnonzero(~coils):
        why = (f"coil {AXES[c]} carries a current in {n_periods[c]} control periods whose coils-on samples "
               f"can be set against an off sample (at least {min_periods} needed)")
        for j in range(3):
            undetermined[crosstalk_name(j, c)] = why
    return n_periods, coils, undetermined


def _pairs(t, m, i, on_idx, after, track: _GyroTrack, block_s) -> PairSet:
    """The pairs (off sample after -> on sample) over the samples used, with their turns from the
    integrated gyro and the field-rate columns of their blocks."""
    b_idx = after[on_idx]
    used = np.unique(np.r_[on_idx, b_idx])
    pos = np.searchsorted(used, np.arange(len(t)))  # position of a used sample in ``used``
    first, second = pos[b_idx], pos[on_idx]
    dt = t[on_idx] - t[b_idx]
    a_on, a_off = track.attitude(t[on_idx]), track.attitude(t[b_idx])
    rel = a_on * a_off.inv()
    turn = rel.as_matrix()
    w = -rel.as_rotvec() / dt[:, None]
    block = np.floor((t[on_idx] - t[on_idx[0]]) / block_s).astype(int)
    segment = np.unique(block, return_inverse=True)[1]
    trend = a_on.as_matrix() * dt[:, None, None]
    return PairSet(m_nT=m[used], i_A=np.nan_to_num(i[used]), first=first, second=second, dt_s=dt, turn=turn,
                   trend=trend, segment=segment, w_rad_s=w)


@dataclass(frozen=True)
class _GyroTrack:
    """The sensor frame's attitude relative to a frame fixed in inertial space, integrated from the
    gyro (``A_{g+1} = exp(-[w x] dt) A_g`` with the mean of the two rates over each interval), at the
    gyro times ``t_s``; ``part`` numbers the stretches without a gap."""

    t_s: np.ndarray
    rotations: Rotation | None
    part: np.ndarray

    @classmethod
    def from_rates(cls, t_s: np.ndarray, w_rad_s: np.ndarray) -> _GyroTrack:
        ok = np.all(np.isfinite(w_rad_s), axis=1)
        t, w = t_s[ok], w_rad_s[ok]
        if len(t) < 2:
            return cls(t, None, np.zeros(len(t), int))
        dt = np.diff(t)
        gap = dt > GYRO_GAP_FACTOR * np.median(dt)
        # a gap is crossed with no turn (the parts are never bridged by a pair)
        steps = Rotation.from_rotvec(np.where(gap[:, None], 0.0, -0.5 * (w[1:] + w[:-1]) * dt[:, None]))
        return cls(t, _cumulative(steps), np.r_[0, np.cumsum(gap)])

    def covers(self, t: np.ndarray, after: np.ndarray) -> np.ndarray:
        """Whether the track runs without a gap from each sample to the sample ``after`` it (N,) bool."""
        if self.rotations is None:
            return np.zeros(len(t), bool)
        a, b = t, t[np.maximum(after, 0)]
        inside = (a >= self.t_s[0]) & (b <= self.t_s[-1])
        pa = self.part[np.clip(np.searchsorted(self.t_s, a, side="right") - 1, 0, len(self.t_s) - 1)]
        pb = self.part[np.clip(np.searchsorted(self.t_s, b, side="left"), 0, len(self.t_s) - 1)]
        return inside & (pa == pb)

    def attitude(self, t: np.ndarray) -> Rotation:
        """The attitude at instants ``t`` inside the track (rotation interpolated at constant rate)."""
        return Slerp(self.t_s, self.rotations)(t)


def _cumulative(steps: Rotation) -> Rotation:
    """``A_0 = I, A_{g+1} = steps_g A_g`` for all g, by a prefix scan (log2(G) vectorised products)."""
    q = steps.as_quat()
    shift = 1
    while shift < len(q):
        q_new = q.copy()
        q_new[shift:] = (Rotation.from_quat(q[shift:]) * Rotation.from_quat(q[:-shift])).as_quat()
        q = q_new
        shift *= 2
    return Rotation.concatenate([Rotation.identity(), Rotation.from_quat(q)])
