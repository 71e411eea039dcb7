"""Coil crosstalk by synchronous detection of the duty cycle: each sample taken with the coils on,
against the samples taken with them off around it.

With ``mag_sampling = "windowed"`` the coils are switched off around every control tick, so the
magnetometer's own samples alternate between readings of the field alone (inside the off windows)
and readings of the field plus the coil field ``K i`` (outside). A sample ``j`` taken with the coils
on, less the field the off samples around it give at its instant (each turned into ``j``'s axes by
the gyro, then a straight line through them in time evaluated at ``t_j``),

    m_j - sum_r w_r R_r m_r = K i_j + (nuisances) + n_j - sum_r w_r R_r n_r,

measures ``K i_j`` directly as a vector, whether or not the current changes from one period to the
next (the step estimate, :mod:`recon.calibrate.steps`, needs it to change; the magnitude fit needs the
dipole to have a part along the field). With ``"coils_on"`` there are no off samples: the samples on
both sides of a current step play their part, which is the step estimate. The regression, its
nuisances and its covariance are :mod:`recon.calibrate.differences`, here with the gyro's scale and
axis errors too (the samples are seconds apart). The straight line cancels the field's own change
along the orbit and, to first order, the gyro's errors, which then only cost a little precision.

Which off samples: those of the windows of ticks ``k+1`` (after ``j``) and ``k-2`` (before it), where
``k`` is the tick that starts ``j``'s period -- not those of ticks ``k`` and ``k-1``. The onboard
controller reads the off samples at tick ``k`` (and, for B-dot, at ``k-1``, whose difference it
takes) to compute ``i_j``, so their noise drives ``i_j``; a regressor correlated with its own noise
biases least squares (the errors-in-variables problem of closed-loop identification; Ljung 1999,
System Identification, 2nd ed., sec. 13.4). On a simulated ten-minute B-dot pass (seed 1, 100 nT
noise, 13-22 mA rms) the difference against the off sample at tick ``k`` alone was off by up to
8,000 nT/A (16 sigma); against the one at ``k+1`` by 1-2 sigma. The window at ``k-2`` adds the straight
line (the field's change and the gyro's errors cancel to first order); wider spans (``k+2``, ``k-3``,
...) did worse on the same passes (relative error 20-24 % with one window each side, 26-33 % with two
or three, on two ten-minute passes: the turn over several seconds makes the nuisances harder to tell
from K). The precision is bounded by the off samples: one per period, each reused by the periods
around it, so with currents that change slowly from one period to the next the reference costs about
one sample's noise per period whatever the weights.

Which on samples: at least ``SETTLE_s`` after the tick that commanded their current (the drive may
take that long to establish it), with every reference window present and the gyro running
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

__all__ = ["SynchronousFit", "fit_crosstalk_synchronous", "SETTLE_s", "STAMP_TOLERANCE_s", "MIN_PERIODS",
           "GYRO_GAP_FACTOR", "NEAR", "REFERENCE_TICKS"]

# On samples closer than this to the tick that commanded their current are not used: a drive takes
# tens to about 150 ms from command to current (common practice, no source).
SETTLE_s = 0.2
# Instants closer than this count as equal (stamps are whole ns; seconds since the pass start in
# floating point carry rounding of ~1e-15 s per second)
STAMP_TOLERANCE_s = 1e-6
# A coil's crosstalk column needs a non-zero current in at least this many control periods (common
# practice, no source).
MIN_PERIODS = 5
# A gyro interval longer than this multiple of the median is a gap: no row spans it.
GYRO_GAP_FACTOR = 1.5
# Off windows used on each side of a coils-on sample (one: more stretched the gyro's turn and lowered
# the precision on simulated passes, see the module notes)
NEAR = 1
# The ticks whose windows serve as references, relative to the tick k that starts the sample's period:
# not k or k - 1 (the controller read them for the current the sample sees)
REFERENCE_TICKS = tuple(range(-1 - NEAR, -1)) + tuple(range(1, NEAR + 1))


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
    ok = np.all(np.isfinite(m), axis=1)
    period = np.searchsorted(ticks, t, side="right") - 1
    refs = _reference_samples(t, off & ok, ticks)
    track = _GyroTrack.from_rates(np.asarray(gyro_t_s, float), np.asarray(w_sensor_rad_s, float))
    on = _on_samples(t, ok & ~off & np.all(np.isfinite(i), axis=1), period, ticks, refs, settle_s)
    on &= track.covers(t, refs, period)
    n_periods, coils, undetermined = _periods_per_coil(i, on, period, min_periods)
    if not np.any(coils):
        nan33 = np.full((3, 3), np.nan)
        return SynchronousFit(nan33, nan33.copy(), np.full((9, 9), np.nan), undetermined, n_periods, np.nan,
                              int(on.sum()), 0)
    rows = _rows(t, m, i, np.flatnonzero(on), refs[np.clip(period[on], 0, len(refs) - 1)], track, block_s)
    fit = fit_differences(rows, coils, gyro_scale=True)
    return SynchronousFit(fit.crosstalk_nT_per_A, fit.sigma_nT_per_A, fit.covariance, undetermined, n_periods,
                          fit.noise_nT, fit.n_pairs, fit.n_rejected)


def _reference_samples(t, off_ok, ticks) -> np.ndarray:
    """For each period k (K, s) the off samples of the reference windows (ticks k + REFERENCE_TICKS),
    -1 where a window has fewer samples than the widest, and a row of -1 when one of them is empty."""
    n_ticks = len(ticks)
    idx = np.flatnonzero(off_ok)
    if not n_ticks or not len(idx):
        return np.full((n_ticks, len(REFERENCE_TICKS)), -1)
    j = np.searchsorted(ticks, t[idx])  # the window of the nearest tick holds the sample
    lo, hi = np.clip(j - 1, 0, n_ticks - 1), np.clip(j, 0, n_ticks - 1)
    near = np.where(np.abs(t[idx] - ticks[lo]) <= np.abs(t[idx] - ticks[hi]), lo, hi)
    width = int(np.bincount(near, minlength=n_ticks).max())
    window = np.full((n_ticks + 1, width), -1)  # the last row: no window
    rank = np.arange(len(idx)) - np.searchsorted(near, near, side="left")
    window[near, rank] = idx
    k = np.arange(n_ticks)[:, None] + np.array(REFERENCE_TICKS)[None, :]
    k = np.where((k >= 0) & (k < n_ticks), k, n_ticks)
    refs = window[k].reshape(n_ticks, -1)  # (K, windows x width)
    complete = np.all(window[k][:, :, 0] >= 0, axis=1)
    refs[~complete] = -1
    return refs


def _on_samples(t, usable, period, ticks, refs, settle_s) -> np.ndarray:
    """Coils-on samples to use (N,) bool: usable, at least ``settle_s`` after their period's tick, and
    with every reference window present."""
    n_ticks = len(ticks)
    inside = (period >= 0) & (period < n_ticks - 1)
    k = np.clip(period, 0, max(n_ticks - 1, 0))
    since = t - ticks[k] if n_ticks else np.zeros(len(t))
    return usable & inside & (since >= settle_s - STAMP_TOLERANCE_s) & (refs[k, 0] >= 0 if n_ticks else False)


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


def _rows(t, m, i, on_idx, refs, track: _GyroTrack, block_s) -> PairSet:
    """The rows (coils-on sample against its reference off samples) with their turns from the
    integrated gyro, the straight-line weights and the field-rate columns of their blocks."""
    present = refs >= 0
    used = np.unique(np.r_[on_idx, refs[present]])
    pos = np.searchsorted(used, np.arange(len(t)))  # position of a used sample in ``used``
    safe = np.where(present, refs, on_idx[:, None])  # an absent reference points at the target, weight 0
    t_ref, t_on = t[safe], t[on_idx]
    n = present.sum(axis=1)
    mean = np.sum(np.where(present, t_ref, 0.0), axis=1) / n
    sxx = np.sum(np.where(present, (t_ref - mean[:, None]) ** 2, 0.0), axis=1)
    weights = np.where(present, 1.0 / n[:, None] + (t_ref - mean[:, None]) * ((t_on - mean) / sxx)[:, None], 0.0)
    a_on = track.attitude(t_on)
    a_ref = track.attitude(t_ref.ravel())
    rel = Rotation.from_quat(np.repeat(a_on.as_quat(), refs.shape[1], axis=0)) * a_ref.inv()
    dt = (t_on[:, None] - t_ref)
    turn = rel.as_matrix().reshape(len(on_idx), -1, 3, 3)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(present[:, :, None], -rel.as_rotvec().reshape(len(on_idx), -1, 3) / dt[:, :, None], 0.0)
    block = np.floor((t_on - t_on[0]) / block_s).astype(int)
    segment = np.unique(block, return_inverse=True)[1]
    trend = a_on.as_matrix() * np.sum(weights * dt, axis=1)[:, None, None]
    return PairSet(m_nT=m[used], i_A=np.nan_to_num(i[used]), target=pos[on_idx], refs=pos[safe], weights=weights,
                   dt_s=np.where(present, dt, 0.0), turn=turn, trend=trend, segment=segment, w_rad_s=w)


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

    def covers(self, t: np.ndarray, refs: np.ndarray, period: np.ndarray) -> np.ndarray:
        """Whether the track runs without a gap over each sample's reference windows (N,) bool:
        from its earliest reference to its latest (``refs`` per period, ``period`` per sample)."""
        if self.rotations is None or not len(refs):
            return np.zeros(len(t), bool)
        r = refs[np.clip(period, 0, len(refs) - 1)]
        present = r >= 0
        a = np.where(present, t[np.maximum(r, 0)], np.inf).min(axis=1)
        b = np.where(present, t[np.maximum(r, 0)], -np.inf).max(axis=1)
        a, b = np.minimum(a, t), np.maximum(b, t)
        inside = present.any(axis=1) & (a >= self.t_s[0]) & (b <= self.t_s[-1])
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
