"""Crosstalk from rotation-compensated differences of magnetometer samples, with its nuisances.

Both gyro-based crosstalk estimates (the current steps, :mod:`recon.calibrate.steps`, and the
synchronous detection of the duty cycle, :mod:`recon.calibrate.synchronous`) regress a sample, the
``target``, less a weighted sum of other samples, its ``references``, each turned into the target's
axes. This module holds that regression once. For the steps the reference is the one sample before
(weight 1); for synchronous detection, off samples on both sides with the weights of a straight line
through them in time.

With ``m_k = S b_k + b0 + K i_k + n_k`` (:mod:`recon.calibrate.model`, sensor axes) and ``R_r`` the
change of the components of a fixed vector from the instant of reference ``r`` to that of the target
seen from the turning sensor frame (``R = exp(-[w x] dt)`` for a constant rate ``w`` over
``dt_r = t_target - t_r``, of either sign), the row

    d = m_t - sum_r w_r R_r m_r
      = K i_t - sum_r w_r R_r K i_r                          (the coil fields)
      + (I - sum_r w_r R_r) b0                               (bias turned with the frame)
      + sum_r w_r ((S - I) R_r b_r - R_r (S - I) b_r)        (soft iron does not commute with the turn)
      + A_t g_dot sum_r w_r dt_r                             (the field's own change along the orbit)
      - sum_r w_r R_r [m_r x] (beta + E w) dt_r              (gyro bias beta and, optionally, the
                                                              gyro's scale and axis errors E, as the
                                                              gyro errs in the magnetometer's axes)
      + n_t - sum_r w_r R_r n_r              (with sum_r w_r = 1)

is exactly linear in ``K`` and, to first order in the small quantities, in the nuisances ``b0``,
``S - I`` (the measured ``m_r`` standing in for ``b_r``), ``beta``, ``E`` (a general 3x3 matrix:
scale factors, non-orthogonality and the rotation between gyro and magnetometer axes) and ``g_dot``:
the field's rate in a frame fixed in inertial space (carried by the integrated gyro, ``A``), one
vector per segment (a block of time, restarted at gaps; its columns vanish when the weights fit a
straight line through the target's instant). The ``E`` columns matter when the samples are far
apart in time (a 3 % scale error turns 8 deg/s over 0.5 s into ~100 nT).

Noise: a sample may appear in several rows, so the rows are correlated. The estimate is ordinary
least squares and its covariance the exact sandwich ``(X^T X)^-1 X^T Sigma_d X (X^T X)^-1`` with
``Sigma_d = sigma^2 D D^T``, ``D`` the operator from the samples' noise to the rows' (row =
``n_t - sum_r w_r R_r n_r``), and ``sigma^2`` estimated without bias from the residual sum of squares
(``E[RSS] = sigma^2 (tr(D D^T) - tr((X^T X)^-1 X^T D D^T X))``; Seber & Lee 2003, Linear Regression
Analysis, sec. 3.3, generalised to a known correlation shape). Rows whose residual lies more than 5
robust sigma from zero (a glitch) are dropped and the fit repeated once.

References
----------
Seber, G. A. F. and Lee, A. J. (2003). Linear Regression Analysis, 2nd ed. Wiley, sections 3.3, 3.10.
Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation. JASA 88,
1273-1283 (the 1.4826 MAD scale).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import robust_scale
from .model import SYM_INDEX

__all__ = ["OUTLIER_FENCE", "PairSet", "DifferenceFit", "fit_differences"]

# Pairs whose residual lies more than this many robust sigma from the median are dropped (common
# practice, no source; the 1.4826 MAD scale: Rousseeuw & Croux 1993).
OUTLIER_FENCE = 5.0


@dataclass(frozen=True)
class PairSet:
    """The rows of one regression: P targets, each with r references, over n kept samples (sensor axes).

    Attributes
    ----------
    m_nT : (n, 3) array, nT
        The kept samples (finite).
    i_A : (n, 3) array, A
        The current each kept sample saw (finite).
    target : (P,) int array
        Each row's target sample (index into ``m_nT``).
    refs : (P, r) int array
        Its reference samples.
    weights : (P, r) array
        Their weights (summing to 1 over a row).
    dt_s : (P, r) array, s
        ``t_target - t_reference`` (either sign).
    turn : (P, r, 3, 3) array
        ``R``: components at the reference to components at the target (see the module notes).
    trend : (P, 3, 3) array
        The field-rate columns of each row, ``A_target sum_r w_r dt_r``.
    segment : (P,) int array
        The segment (block of constant field rate) of each row, 0, 1, ... in order.
    w_rad_s : (P, r, 3) array, rad/s, sensor axes
        The mean measured rate from each reference to the target (for the gyro scale columns).
    """

    m_nT: np.ndarray
    i_A: np.ndarray
    target: np.ndarray
    refs: np.ndarray
    weights: np.ndarray
    dt_s: np.ndarray
    turn: np.ndarray
    trend: np.ndarray
    segment: np.ndarray
    w_rad_s: np.ndarray

    @classmethod
    def of_pairs(cls, m_nT, i_A, first, second, dt_s, turn, trend, segment, w_rad_s) -> PairSet:
        """Rows with one reference each (``first``, weight 1) and the target ``second``."""
        return cls(m_nT, i_A, np.asarray(second), np.asarray(first)[:, None], np.ones((len(first), 1)),
                   np.asarray(dt_s)[:, None], np.asarray(turn)[:, None], trend, segment, np.asarray(w_rad_s)[:, None])


@dataclass(frozen=True)
class DifferenceFit:
    """Result of :func:`fit_differences`.

    Attributes
    ----------
    crosstalk_nT_per_A : (3, 3) array; NaN in the columns of the coils not fitted
    covariance : (9, 9) array, (nT/A)^2, row-major K; NaN rows/columns for the coils not fitted
    noise_nT : float
        Magnetometer noise per axis (1 sigma) estimated from the residuals.
    n_pairs, n_rejected : int
        Rows used and rows dropped as glitches.
    """

    crosstalk_nT_per_A: np.ndarray
    covariance: np.ndarray
    noise_nT: float
    n_pairs: int
    n_rejected: int

    @property
    def sigma_nT_per_A(self) -> np.ndarray:
        """1-sigma of each element (3, 3), NaN where not fitted."""
        return np.sqrt(np.diag(self.covariance)).reshape(3, 3)


@dataclass(frozen=True)
class _Design:
    """The stacked regression: ``x`` (P, 3, p) for K (the columns ``cols_k``, (sensor axis, coil)) and
    the nuisances; ``y`` (P, 3) nT."""

    x: np.ndarray
    y: np.ndarray
    cols_k: list[tuple[int, int]]


def fit_differences(pairs: PairSet, coils: np.ndarray, *, gyro_scale: bool = False) -> DifferenceFit:
    """K and its covariance from the rotation-compensated differences of ``pairs``.

    Parameters
    ----------
    pairs : PairSet
    coils : (3,) bool array
        The coils whose crosstalk columns are fitted (the others are left out of the design).
    gyro_scale : bool
        Add the nine columns of the gyro's scale and axis errors ``E`` (see the module notes).

    Returns
    -------
    DifferenceFit
    """
    design = _design(pairs, coils, gyro_scale)
    theta, rss, xt, use = _robust_fit(design, pairs.trend, pairs.segment)
    cov_all, sigma2 = _sandwich_covariance(xt, pairs, use, rss)
    n_k = len(design.cols_k)
    flat = [3 * j + c for j, c in design.cols_k]
    k_est = np.full(9, np.nan)
    k_est[flat] = theta[:n_k]
    cov = np.full((9, 9), np.nan)
    cov[np.ix_(flat, flat)] = cov_all[:n_k, :n_k]
    return DifferenceFit(k_est.reshape(3, 3), cov, float(np.sqrt(sigma2)), len(pairs.target), int((~use).sum()))


def _design(pairs: PairSet, coils, gyro_scale: bool) -> _Design:
    """The regression of ``d = m_t - sum_r w_r R_r m_r`` on K (the coils given), the bias, the soft
    iron, the gyro bias and optionally the gyro's scale and axis errors; the field rates enter as the
    ``trend`` columns (see the module notes)."""
    tgt, m, i = pairs.target, pairs.m_nT, pairs.i_A
    wr = pairs.turn * pairs.weights[:, :, None, None]  # w_r R_r (P, r, 3, 3)
    cols_k = [(j, c) for j in range(3) for c in range(3) if coils[c]]
    bias_col = len(cols_k)
    soft_col = bias_col + 3
    gyro_col = soft_col + 6
    scale_col = gyro_col + 3
    n_par = scale_col + (9 if gyro_scale else 0)
    x = np.zeros((len(tgt), 3, n_par))
    eye = np.eye(3)
    i_ref = i[pairs.refs]  # (P, r, 3)
    for col, (j, c) in enumerate(cols_k):
        x[:, :, col] = i[tgt, c][:, None] * eye[j] - np.einsum("pr,pra->pa", i_ref[:, :, c], wr[:, :, :, j])
    x[:, :, bias_col:bias_col + 3] = eye - wr.sum(axis=1)
    mr = m[pairs.refs]  # (P, r, 3)
    rm = np.einsum("prab,prb->pa", wr, mr)  # sum_r w_r R_r m_r
    for n, (a, b) in enumerate(SYM_INDEX):
        xi = np.zeros((3, 3))
        xi[a, b] = xi[b, a] = 1.0
        x[:, :, soft_col + n] = rm @ xi.T - np.einsum("prab,prb->pa", wr, mr @ xi.T)
    # gyro bias: -sum_r w_r R_r [m_r x] dt_r; column e of [m x] is m x e_e
    turned_cross = [-np.einsum("prab,prb->pra", wr, np.cross(mr, eye[e])) * pairs.dt_s[:, :, None]
                    for e in range(3)]  # each (P, r, 3)
    for e in range(3):
        x[:, :, gyro_col + e] = turned_cross[e].sum(axis=1)
    if gyro_scale:
        # E w: element (e, q) of E contributes w_q along e_e
        for e in range(3):
            for q in range(3):
                x[:, :, scale_col + 3 * e + q] = np.einsum("pra,pr->pa", turned_cross[e], pairs.w_rad_s[:, :, q])
    y = m[tgt] - rm
    return _Design(x, y, cols_k)


def _robust_fit(design: _Design, trend, seg):
    """Least squares, then again without the pairs beyond the outlier fence (at most twice).
    Returns (theta, RSS, the design with the field-rate columns projected out, the pairs used)."""
    x, y = design.x, design.y
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


def _sandwich_covariance(xt, pairs: PairSet, use, rss):
    """Covariance of theta (p, p) and the noise variance sigma^2 (nT^2) from the sandwich with the
    correlated noise of the rows: Z = D^T X (X with the field-rate columns projected out, which
    leaves the estimate and its covariance unchanged: Frisch-Waugh-Lovell)."""
    n_par = xt.shape[2]
    xu = xt[use]
    wr = pairs.turn[use] * pairs.weights[use][:, :, None, None]
    z = np.zeros((len(pairs.m_nT), 3, n_par))
    np.add.at(z, pairs.target[use], xu)
    np.add.at(z, pairs.refs[use], -np.einsum("prba,pbi->prai", wr, xu))
    xf, zf = xu.reshape(-1, n_par), z.reshape(-1, n_par)
    xx = xf.T @ xf
    zz = zf.T @ zf
    xx_inv = np.linalg.pinv(xx, hermitian=True)
    # E[RSS] = sigma^2 (tr(D D^T) - tr(H D D^T)), tr(D D^T) = 3 (1 + sum_r w_r^2) per row; the
    # field-rate columns add between 0 and 6 per segment to tr(H D D^T) (3 is taken): an error below
    # one part in the number of rows
    n_used_seg = len(np.unique(pairs.segment[use]))
    tr_dd = 3.0 * float(np.sum(1.0 + np.sum(pairs.weights[use] ** 2, axis=1)))
    dof = tr_dd - float(np.trace(xx_inv @ zz)) - 3.0 * n_used_seg
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

    Solved through the normal equations of the column-normalised design (p is under thirty and the
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
