"""Coil crosstalk from the magnetometer's response to current steps: no reference field needed.

Between two consecutive magnetometer samples ``k`` and ``k+1`` (sensor axes, interval ``dt_k``) the
satellite turns by the gyro's rate ``w`` and the true field's components turn with it. With
``m_k = S b_k + b0 + K i_k + n_k`` (:mod:`recon.calibrate.model`) and ``R_k = exp(-[w x] dt_k)``
(the change of the components of a fixed vector seen from a frame turning at ``w``;
``Rotation.from_rotvec(-w dt)``), the rotation-compensated difference is

    d_k = m_{k+1} - R_k m_k
        = K i_{k+1} - R_k K i_k                      (the step, ~ K (i_{k+1} - i_k))
        + (I - R_k) b0                               (bias turned with the frame)
        + (S - I) R_k b_k - R_k (S - I) b_k          (soft iron does not commute with the turn)
        + A_{k+1} g_dot dt_k                         (the field's own change along the orbit)
        - R_k [m_k x] beta dt_k                      (gyro bias beta: R_k is built from w + beta)
        + n_{k+1} - R_k n_k,

exactly linear in ``K`` and, to first order in the small quantities, in the nuisances ``b0``,
``S - I`` (with the measured ``m_k`` standing in for ``b_k``), the gyro bias ``beta`` (sensor axes,
constant over the pass) and ``g_dot``: the rate of the field
in a frame fixed in inertial space (the sensor frame at the start of a block, carried by the
integrated gyro ``A``), one constant vector per block of ``block_s`` seconds. Intervals across which
a coil current steps carry the information on ``K``; the others pin the nuisances. The nuisances
matter: under B-dot control the current follows ``w x b``, and so does the soft-iron term, which
would otherwise bias ``K`` by several percent.

Noise: ``d_k`` and ``d_{k+1}`` share ``n_{k+1}``, so the differences are correlated (moving average
of order one). The estimate is ordinary least squares (all rows have the same variance ``2 sigma^2``
for isotropic noise, so it is also the weighted solution), and its covariance is the exact sandwich
``(X^T X)^-1 X^T Sigma_d X (X^T X)^-1`` with ``Sigma_d = sigma^2 D D^T``, ``D`` the difference
operator, and ``sigma^2`` estimated without bias from the residual sum of squares
(``E[RSS] = sigma^2 (tr(D D^T) - tr((X^T X)^-1 X^T D D^T X))``; Seber & Lee 2003, Linear Regression
Analysis, sec. 3.3, generalised to a known correlation shape). Rows whose residual lies more than 5
robust sigma from zero (a glitch) are dropped and the fit repeated once.

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
Seber, G. A. F. and Lee, A. J. (2003). Linear Regression Analysis, 2nd ed. Wiley, sections 3.3, 3.10.
Ljung, L. (1999). System Identification: Theory for the User, 2nd ed. Prentice Hall, chapter 13.
Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation. JASA 88,
1273-1283 (the 1.4826 MAD scale).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import robust_scale
from .model import AXES, SYM_INDEX, crosstalk_name

__all__ = ["StepFit", "fit_crosstalk_steps", "MIN_STEP_FRACTION", "MIN_STEPS"]

# A current change counts as a step for coil l when |di_l| >= this fraction of its maximum current
# (common practice, no source).
MIN_STEP_FRACTION = 0.05
# Fewer steps than this on a coil leave its crosstalk column undetermined (common practice, no source).
MIN_STEPS = 5
# A log interval longer than this multiple of the median interval is a gap: no pair spans it.
GAP_FACTOR = 1.5
# Pairs whose residual lies more than this many robust sigma from the median are dropped (common
# practice, no source; the 1.4826 MAD scale: Rousseeuw & Croux 1993).
OUTLIER_FENCE = 5.0


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


@dataclass(frozen=True)
class _Design:
    """The stacked regression of the differences: ``x`` (P, 3, p) for K (the columns ``cols_k``,
    (sensor axis, coil)), bias, soft iron and gyro bias; ``y`` (P, 3) nT; ``trend`` (P, 3, 3), the
    field-rate columns of each pair's segment."""

    x: np.ndarray
    y: np.ndarray
    trend: np.ndarray
    cols_k: list[tuple[int, int]]


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
    r_mat, a_next, seg = _turns(pairs, tg, wg, block_s)
    design = _design(pairs, r_mat, a_next, coils)
    theta, rss, xt, use = _robust_fit(design, seg)
    cov_all, sigma2 = _sandwich_covariance(xt, r_mat, pairs.first, use, len(pairs.t_s), rss, seg)

    cols_k = design.cols_k
    n_k = len(cols_k)
    k_est = np.full((3, 3), np.nan)
    cov = np.full((9, 9), np.nan)
    flat = [3 * j + c for j, c in cols_k]
    for col, (j, c) in enumerate(cols_k):
        k_est[j, c] = theta[col]
    cov[np.ix_(flat, flat)] = cov_all[:n_k, :n_k]
    sig = np.full((3, 3), np.nan)
    sig.ravel()[flat] = np.sqrt(np.diag(cov_all)[:n_k])
    return StepFit(k_est, sig, cov, undetermined, n_steps, float(np.sqrt(sigma2)), len(pairs.first),
                   int((~use).sum()))


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


def _turns(pairs: _Pairs, tg, wg, block_s):
    """Each pair's turn ``R_k`` (P, 3, 3); the attitude of the sensor frame relative to a frame fixed
    in inertial space after it, ``A_{k+1} = R_k A_k`` (P, 3, 3), restarted at gaps and at block
    starts; and the segment (P,) each pair belongs to."""
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
    return r_mat, a_next, seg


def _design(pairs: _Pairs, r_mat, a_next, coils) -> _Design:
    """The regression of ``d_k = m_{k+1} - R_k m_k`` on K (the coils with steps), the bias, the soft
    iron and the gyro bias; the field rates enter as the ``trend`` columns (see the module notes)."""
    k0, m, i, dt = pairs.first, pairs.m_nT, pairs.i_A, pairs.dt_s
    # columns: K (one per (sensor axis, coil) of a coil with steps), bias (3), soft iron (6, in the
    # order of SYM_INDEX), gyro bias (3); the field rates are projected out
    cols_k = [(j, c) for j in range(3) for c in range(3) if coils[c]]
    bias_col = len(cols_k)
    soft_col = bias_col + 3
    gyro_col = soft_col + 6
    n_par = gyro_col + 3
    n_p = len(k0)
    x = np.zeros((n_p, 3, n_par))
    eye = np.eye(3)
    for col, (j, c) in enumerate(cols_k):
        x[:, :, col] = i[k0 + 1, c][:, None] * eye[j] - i[k0, c][:, None] * r_mat[:, :, j]
    x[:, :, bias_col:bias_col + 3] = eye - r_mat
    mk = m[k0]
    rm = np.einsum("pab,pb->pa", r_mat, mk)
    for n, (a, b) in enumerate(SYM_INDEX):
        xi = np.zeros((3, 3))
        xi[a, b] = xi[b, a] = 1.0
        x[:, :, soft_col + n] = rm @ xi.T - np.einsum("pab,pb->pa", r_mat, mk @ xi.T)
    # gyro bias: -R_k [m_k x] dt_k, column e of [m x] is m x e_e
    for e in range(3):
        x[:, :, gyro_col + e] = -np.einsum("pab,pb->pa", r_mat, np.cross(mk, eye[e])) * dt[:, None]
    trend = a_next * dt[:, None, None]  # (P, 3, 3): the field-rate columns of each pair's segment
    y = m[k0 + 1] - rm
    return _Design(x, y, trend, cols_k)


def _robust_fit(design: _Design, seg):
    """Least squares, then again without the pairs beyond the outlier fence (at most twice).
    Returns (theta, RSS, the design with the field-rate columns projected out, the pairs used)."""
    x, y, trend = design.x, design.y, design.trend
    n_seg = int(seg[-1]) + 1
    use = np.ones(len(x), bool)
    for _ in range(2):
        theta, rss, xt, yt = _ols_segments(x, y, trend, seg, n_seg, use)
        r_norm = np.linalg.norm(yt - xt @ theta, axis=1)
        scale = robust_scale(r_norm[use])
        new_use = r_norm <= np.median(r_norm[use]) + OUTLIER_FENCE * max(scale, 1e-9)
        if np.array_equal(new_use, use):
            break
        use = new_use
    theta, rss, xt, _ = _ols_segments(x, y, trend, seg, n_seg, use)
    return theta, rss, xt, use


def _sandwich_covariance(xt, r_mat, k0, use, n_samples, rss, seg):
    """Covariance of theta (p, p) and the noise variance sigma^2 (nT^2) from the sandwich with the
    MA(1) noise of the differences: Z = D^T X (X with the field-rate columns projected out, which
    leaves the estimate and its covariance unchanged: Frisch-Waugh-Lovell)."""
    n_par = xt.shape[2]
    xu, ru, ku = xt[use], r_mat[use], k0[use]
    z = np.zeros((n_samples, 3, n_par))
    np.add.at(z, ku + 1, xu)
    np.add.at(z, ku, -np.einsum("pba,pbi->pai", ru, xu))
    xf, zf = xu.reshape(-1, n_par), z.reshape(-1, n_par)
    xx = xf.T @ xf
    zz = zf.T @ zf
    xx_inv = np.linalg.pinv(xx, hermitian=True)
    # E[RSS] = sigma^2 (tr(D D^T) - tr(H D D^T)); the field-rate columns add between 0 and 6 per
    # segment to tr(H D D^T) (3 is taken): an error below one part in the number of pairs
    n_used_seg = len(np.unique(seg[use]))
    dof = 6.0 * len(ku) - float(np.trace(xx_inv @ zz)) - 3.0 * n_used_seg
    sigma2 = rss / max(dof, 1.0)
    return sigma2 * xx_inv @ zz @ xx_inv, sigma2


def _ols_segments(x, y, trend, seg, n_seg, use):
    """Least squares of ``y`` on ``x`` plus one field-rate vector per segment (columns ``trend``).

    The segment columns are projected out segment by segment (Frisch-Waugh-Lovell: the coefficients
    of ``x`` from the residualised problem equal those of the full one), so the design never holds a
    column per segment. Returns (theta, RSS, residualised x, residualised y), the latter for all
    pairs, with the projections computed from the pairs in ``use``.
    """
    n_par = x.shape[2]
    tu, xu, yu, su = trend[use], x[use], y[use], seg[use]
    g = np.zeros((n_seg, 3, 3))
    np.add.at(g, su, np.einsum("pai,paj->pij", tu, tu))
    tx = np.zeros((n_seg, 3, n_par))
    np.add.at(tx, su, np.einsum("pai,paj->pij", tu, xu))
    ty = np.zeros((n_seg, 3))
    np.add.at(ty, su, np.einsum("pai,pa->pi", tu, yu))
    g_inv = np.linalg.pinv(g, hermitian=True)
    cx = g_inv @ tx  # (S, 3, n_par)
    cy = np.einsum("sij,sj->si", g_inv, ty)
    xt = x - np.einsum("pab,pbi->pai", trend, cx[seg])
    yt = y - np.einsum("pab,pb->pa", trend, cy[seg])
    theta, rss = _ols(xt[use], yt[use])
    return theta, rss, xt, yt


def _ols(x3: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, float]:
    """Least squares over stacked (P, 3, p) design and (P, 3) data; returns (theta, RSS).

    Solved through the normal equations of the column-normalised design (p is under twenty and the
    normalised design well conditioned, so squaring its condition number costs no accuracy that
    matters), with a pseudo-inverse for any column the data leave empty."""
    a = x3.reshape(-1, x3.shape[-1])
    b = y.reshape(-1)
    scale = np.linalg.norm(a, axis=0)
    scale[scale == 0] = 1.0
    an = a / scale
    theta = np.linalg.pinv(an.T @ an, rcond=1e-13, hermitian=True) @ (an.T @ b)
    theta = theta / scale
    r = b - a @ theta
    return theta, float(r @ r)
