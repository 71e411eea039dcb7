"""Coil crosstalk from the magnetometer's response to current steps: no reference field needed.

Between two consecutive magnetometer samples ``k`` and ``k+1`` (sensor axes, interval ``dt_k``) the
satellite turns by the gyro's rate ``w`` and the true field's components turn with it. With
``R_k = exp(-[w x] dt_k)`` (``Rotation.from_rotvec(-w dt)``) the rotation-compensated difference

    d_k = m_{k+1} - R_k m_k = K i_{k+1} - R_k K i_k + (nuisances) + n_{k+1} - R_k n_k

is regressed on K, the magnetometer bias and soft iron, the gyro bias and the field's own rate along
the orbit (one vector per block of ``block_s`` seconds) by :mod:`recon.calibrate.differences`, which
holds the model, the noise correlation and the covariance. Intervals across which a coil current
steps carry the information on ``K``; the others pin the nuisances. The nuisances matter: under
B-dot control the current follows ``w x b``, and so does the soft-iron term, which would otherwise
bias ``K`` by several percent.

Closed loop: a controller computes the next command from the samples it reads at a tick (B-dot from
their difference), so the noise of such a sample drives the current step that follows it. A pair
that ends on that sample before the step and on the next sample after it then has a regressor
correlated with its own noise, and least squares is biased (the errors-in-variables problem of
closed-loop identification; Ljung 1999, System Identification, 2nd ed., sec. 13.4). On a simulated
B-dot pass this bias exceeded 50 %. The caller therefore marks the samples the controller reads
(``skip``: the samples inside the off windows, or the last sample before each change of the logged
current), and the pairs bridge them: ``(k - 1, k + 1)`` with the gyro turn over both intervals, whose
noise is independent of the command.

References
----------
Ljung, L. (1999). System Identification: Theory for the User, 2nd ed. Prentice Hall, chapter 13.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from .differences import PairSet, fit_differences
from .model import AXES, crosstalk_name

__all__ = ["StepFit", "fit_crosstalk_steps", "MIN_STEP_FRACTION", "MIN_STEPS"]

# A current change counts as a step for coil l when |di_l| >= this fraction of its maximum current
# (common practice, no source).
MIN_STEP_FRACTION = 0.05
# Fewer steps than this on a coil leave its crosstalk column undetermined (common practice, no source).
MIN_STEPS = 5
# A log interval longer than this multiple of the median interval is a gap: no pair spans it.
GAP_FACTOR = 1.5


@dataclass(frozen=True)
class StepFit:
    """Crosstalk from current steps.

    Attributes
    ----------
    crosstalk_nT_per_A : (3, 3) array, nT per A, sensor axes x coils; NaN where undetermined
    sigma_nT_per_A : (3, 3) array, 1 sigma; NaN where undetermined
    covariance : (9, 9) array, row-major order of K; NaN rows/columns where undetermined
    undetermined : dict
        ``crosstalk_<axis>_coil_<coil>`` -> reason.
    n_steps : (3,) int array
        Steps per coil used.
    noise_nT : float
        Magnetometer noise per axis (1 sigma) estimated from the differences.
    n_pairs, n_rejected : int
    """

    crosstalk_nT_per_A: np.ndarray
    sigma_nT_per_A: np.ndarray
    covariance: np.ndarray
    undetermined: dict[str, str]
    n_steps: np.ndarray
    noise_nT: float
    n_pairs: int
    n_rejected: int


@dataclass(frozen=True)
class _Pairs:
    """Pairs of kept samples ``(first, first + 1)`` with no log gap and a gyro rate between them.

    ``t_s`` (n,) s, ``m_nT`` (n, 3) nT sensor axes and ``i_A`` (n, 3) A are the kept samples (finite,
    not read by the controller); ``first`` (P,) indexes each pair's first sample, ``dt_s`` (P,) s
    its interval."""

    t_s: np.ndarray
    m_nT: np.ndarray
    i_A: np.ndarray
    first: np.ndarray
    dt_s: np.ndarray


def _interp_rate(t_query, t_gyro, w_gyro):
    return np.column_stack([np.interp(t_query, t_gyro, w_gyro[:, a]) for a in range(3)])


def fit_crosstalk_steps(t_s: np.ndarray, m_sensor_nT: np.ndarray, i_coil_A: np.ndarray,
                        gyro_t_s: np.ndarray, w_sensor_rad_s: np.ndarray, max_current_A: np.ndarray,
                        *, skip: np.ndarray | None = None, block_s: float = 30.0,
                        min_step_fraction: float = MIN_STEP_FRACTION, min_steps: int = MIN_STEPS) -> StepFit:
    """Estimate the crosstalk K from the magnetometer's steps when coil currents change.

    Parameters
    ----------
    t_s : (N,) array, s
        Magnetometer sample times (increasing, any origin shared with ``gyro_t_s``).
    m_sensor_nT : (N, 3) array, nT, sensor axes
        Measured field; rows with NaN are skipped.
    i_coil_A : (N, 3) array, A
        Effective coil current each sample saw; NaN rows are skipped.
    gyro_t_s : (G,) array, s
        Gyro sample times (increasing).
    w_sensor_rad_s : (G, 3) array, rad/s, magnetometer sensor axes
        Body rate expressed in the magnetometer's axes (``M^T w_body``).
    max_current_A : (3,) array, A
    skip : (N,) bool array, optional
        Samples the onboard controller read to compute the next command (see the module notes);
        pairs are formed across them, from the sample before to the sample after.
    block_s : float
        Length of the blocks over which the field's inertial rate is taken constant, s.
    min_step_fraction, min_steps : float, int
        What counts as a step, and how many steps a coil needs.

    Returns
    -------
    StepFit
    """
    t = np.asarray(t_s, dtype=float)
    m = np.asarray(m_sensor_nT, dtype=float)
    i = np.asarray(i_coil_A, dtype=float)
    tg = np.asarray(gyro_t_s, dtype=float)
    wg = np.asarray(w_sensor_rad_s, dtype=float)
    imax = np.asarray(max_current_A, dtype=float)
    gyro_ok = np.all(np.isfinite(wg), axis=1)
    tg, wg = tg[gyro_ok], wg[gyro_ok]

    pairs = _pairs(t, m, i, tg, skip)
    n_steps, coils, undetermined = _steps_per_coil(pairs, imax, min_step_fraction, min_steps)
    if not np.any(coils):
        nan33 = np.full((3, 3), np.nan)
        return StepFit(nan33, nan33.copy(), np.full((9, 9), np.nan), undetermined, n_steps, np.nan,
                       len(pairs.first), 0)
    fit = fit_differences(_turned_pairs(pairs, tg, wg, block_s), coils)
    return StepFit(fit.crosstalk_nT_per_A, fit.sigma_nT_per_A, fit.covariance, undetermined, n_steps, fit.noise_nT,
                   fit.n_pairs, fit.n_rejected)


def _pairs(t, m, i, tg, skip) -> _Pairs:
    """Consecutive kept samples form a pair unless the log has a gap between them or the gyro has
    none at the pair's middle (``tg``: the valid gyro times)."""
    ok = np.all(np.isfinite(m), axis=1) & np.all(np.isfinite(i), axis=1)
    dt_all = np.diff(t)
    nominal_dt = np.median(dt_all[dt_all > 0]) if np.any(dt_all > 0) else np.nan
    gap_count = np.r_[0, np.cumsum(dt_all > GAP_FACTOR * nominal_dt)]
    if skip is not None:
        ok &= ~np.asarray(skip, dtype=bool)
    idx = np.flatnonzero(ok)
    t, m, i = t[idx], m[idx], i[idx]
    dt = np.diff(t)
    pair = (dt > 0) & (gap_count[idx[1:]] == gap_count[idx[:-1]])
    if len(tg) >= 2:
        tm = 0.5 * (t[1:] + t[:-1])
        pair &= (tm >= tg[0]) & (tm <= tg[-1])
        # no rate across a gyro gap: the pair's middle must lie between gyro samples that are close
        j = np.clip(np.searchsorted(tg, tm), 1, len(tg) - 1)
        gyro_dt = np.median(np.diff(tg))
        pair &= (tg[j] - tg[j - 1]) <= GAP_FACTOR * max(gyro_dt, float(np.median(dt)) if len(dt) else 0.0)
    else:
        pair[:] = False
    k0 = np.flatnonzero(pair)
    return _Pairs(t, m, i, k0, dt[k0])


def _steps_per_coil(pairs: _Pairs, imax, min_step_fraction, min_steps):
    """Steps per coil (3,), which coils have enough of them (3,) bool, and the reasons for the
    crosstalk columns of the others (name -> reason)."""
    k0, i = pairs.first, pairs.i_A
    di = i[k0 + 1] - i[k0] if len(k0) else np.zeros((0, 3))
    n_steps = np.sum(np.abs(di) >= min_step_fraction * imax, axis=0)
    coils = n_steps >= min_steps
    undetermined: dict[str, str] = {}
    for c in np.flatnonzero(~coils):
        why = (f"coil {AXES[c]} current steps by at least {100 * min_step_fraction:g} % of its range "
               f"{n_steps[c]} times between consecutive samples with a gyro rate (at least {min_steps} needed)")
        for j in range(3):
            undetermined[crosstalk_name(j, c)] = why
    return n_steps, coils, undetermined


def _turned_pairs(pairs: _Pairs, tg, wg, block_s) -> PairSet:
    """The pairs with each one's turn ``R_k`` (the gyro rate at the pair's middle held over it); the
    attitude of the sensor frame relative to a frame fixed in inertial space after it,
    ``A_{k+1} = R_k A_k``, restarted at gaps and at block starts (its field-rate columns
    ``A_{k+1} dt_k``); and the segment each pair belongs to."""
    t, k0 = pairs.t_s, pairs.first
    w = _interp_rate(0.5 * (t[k0] + t[k0 + 1]), tg, wg)
    rot = Rotation.from_rotvec(-w * pairs.dt_s[:, None])
    r_mat = rot.as_matrix()  # (P, 3, 3)
    block = np.floor((t[k0] - t[0]) / block_s).astype(int)
    seg = np.cumsum(np.r_[0, (np.diff(k0) != 1) | (np.diff(block) != 0)])  # new segment at gaps/blocks
    a_next = np.empty_like(r_mat)
    acc = np.eye(3)
    for p in range(len(k0)):
        if p == 0 or seg[p] != seg[p - 1]:
            acc = np.eye(3)
        acc = r_mat[p] @ acc
        a_next[p] = acc
    return PairSet.of_pairs(pairs.m_nT, pairs.i_A, k0, k0 + 1, pairs.dt_s, r_mat, a_next * pairs.dt_s[:, None, None],
                            seg, w)
