"""Crosstalk from rotation-compensated differences of magnetometer sample pairs, with its nuisances.

Both gyro-based crosstalk estimates (the current steps, :mod:`recon.calibrate.steps`, and the
synchronous detection of the duty cycle, :mod:`recon.calibrate.synchronous`) regress the difference
of two magnetometer samples, ``first`` and ``second``, with the turn of the field between them removed.
This module holds that regression once.

With ``m_k = S b_k + b0 + K i_k + n_k`` (:mod:`recon.calibrate.model`, sensor axes) and ``R`` the
change of the components of a fixed vector from the instant of ``first`` to that of ``second`` seen
from the turning sensor frame (``R = exp(-[w x] dt)`` for a constant rate ``w`` over
``dt = t_second - t_first``, which may be negative), the difference is

    d = m_second - R m_first
      = K i_second - R K i_first                     (the coil fields)
      + (I - R) b0                                   (bias turned with the frame)
      + (S - I) R b_first - R (S - I) b_first        (soft iron does not commute with the turn)
      + A_second g_dot dt                            (the field's own change along the orbit)
      - R [m_first x] (beta + E w) dt                (gyro bias beta and, optionally, the gyro's
                                                      scale and axis errors E, both as the gyro
                                                      errs in the magnetometer's axes)
      + n_second - R n_first,

exactly linear in ``K`` and, to first order in the small quantities, in the nuisances ``b0``,
``S - I`` (the measured ``m_first`` standing in for ``b_first``), ``beta``, ``E`` (a general 3x3
matrix: scale factors, non-orthogonality and the rotation between gyro and magnetometer axes) and
``g_dot``: the field's rate in a frame fixed in inertial space (carried by the integrated gyro,
``A``), one vector per segment (a block of time, restarted at gaps). The ``E`` columns matter when
the two samples are far apart in time (a 3 % scale error turns 8 deg/s over 0.5 s into ~100 nT).

Noise: a sample may appear in several pairs, so the differences are correlated. The estimate is
ordinary least squares (rows of equal variance ``2 sigma^2`` for isotropic noise) and its covariance
the exact sandwich ``(X^T X)^-1 X^T Sigma_d X (X^T X)^-1`` with ``Sigma_d = sigma^2 D D^T``, ``D``
the difference operator (row = ``n_second - R n_first``), and ``sigma^2`` estimated without bias
from the residual sum of squares (``E[RSS] = sigma^2 (tr(D D^T) - tr((X^T X)^-1 X^T D D^T X))``;
Seber & Lee 2003, Linear Regression Analysis, sec. 3.3, generalised to a known correlation shape).
Rows whose residual lies more than 5 robust sigma from zero (a glitch) are dropped and the fit
repeated once.

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
    """The sample pairs of one regression (P pairs over n kept samples, sensor axes).

    Attributes
    ----------
    m_nT : (n, 3) array, nT
        The kept samples (finite).
    i_A : (n, 3) array, A
        The current each kept sample saw (finite).
    first, second : (P,) int arrays
        Each pair's samples (indices into ``m_nT``).
    dt_s : (P,) array, s
        ``t_second - t_first`` (negative when ``second`` comes first).
    turn : (P, 3, 3) array
        ``R``: components at ``first`` to components at ``second`` (see the module notes).
    trend : (P, 3, 3) array
        The field-rate columns of each pair, ``A_second dt``.
    segment : (P,) int array
        The segment (block of constant field rate) of each pair, 0, 1, ... in order.
    w_rad_s : (P, 3) array, rad/s, sensor axes
        The mean measured rate over each pair (for the gyro scale columns).
    """

    m_nT: np.ndarray
    i_A: np.ndarray
    first: np.ndarray
    second: np.ndarray
    dt_s: np.ndarray
    turn: np.ndarray
    trend: np.ndarray
    segment: np.ndarray
    w_rad_s: np.ndarray


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
    return DifferenceFit(k_est.reshape(3, 3), cov, float(np.sqrt(sigma2)), len(pairs.first), int((~use).sum()))


def _design(pairs: PairSet, coils, gyro_scale: bool) -> _Design:
    """The regression of ``d = m_second - R m_first`` on K (the coils given), the bias, the soft iron,
    the gyro bias and optionally the gyro's scale and axis errors; the field rates enter as the
    ``trend`` columns (see the module notes)."""
    first, second, m, i, r_mat, dt = pairs.first, pairs.second, pairs.m_nT, pairs.i_A, pairs.turn, pairs.dt_s
    cols_k = [(j, c) for j in range(3) for c in range(3) if coils[c]]
    bias_col = len(cols_k)
    soft_col = bias_col + 3
    gyro_col = soft_col + 6
    scale_col = gyro_col + 3
    n_par = scale_col + (9 if gyro_scale else 0)
    x = np.zeros((len(first), 3, n_par))
    eye = np.eye(3)
    for col, (j, c) in enumerate(cols_k):
        x[:, :, col] = i[second, c][:, None] * eye[j] - i[first, c][:, None] * r_mat[:, :, j]
    x[:, :, bias_col:bias_col + 3] = eye - r_mat
    mf = m[first]
    rm = np.einsum("pab,pb->pa", r_mat, mf)
    for n, (a, b) in enumerate(SYM_INDEX):
        xi = np.zeros((3, 3))
        xi[a, b] = xi[b, a] = 1.0
        x[:, :, soft_col + n] = rm @ xi.T - np.einsum("pab,pb->pa", r_mat, mf @ xi.T)
    # gyro bias: -R [m x] dt, column e of [m x] is m x e_e
    turned_cross = [-np.einsum("pab,pb->pa", r_mat, np.cross(mf, eye[e])) * dt[:, None] for e in range(3)]
    for e in range(3):
        x[:, :, gyro_col + e] = turned_cross[e]
    if gyro_scale:
        # E w: element (e, q) of E contributes w_q along e_e
        for e in range(3):
            for q in range(3):
                x[:, :, scale_col + 3 * e + q] = turned_cross[e] * pairs.w_rad_s[:, q][:, None]
    y = m[second] - rm
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
    correlated noise of the differences: Z = D^T X (X with the field-rate columns projected out, which
    leaves the estimate and its covariance unchanged: Frisch-Waugh-Lovell)."""
    n_par = xt.shape[2]
    xu, ru = xt[use], pairs.turn[use]
    z = np.zeros((len(pairs.m_nT), 3, n_par))
    np.add.at(z, pairs.second[use], xu)
    np.add.at(z, pairs.first[use], -np.einsum("pba,pbi->pai", ru, xu))
    xf, zf = xu.reshape(-1, n_par), z.reshape(-1, n_par)
    xx = xf.T @ xf
    zz = zf.T @ zf
    xx_inv = np.linalg.pinv(xx, hermitian=True)
    # E[RSS] = sigma^2 (tr(D D^T) - tr(H D D^T)); the field-rate columns add between 0 and 6 per
    # segment to tr(H D D^T) (3 is taken): an error below one part in the number of pairs
    n_used_seg = len(np.unique(pairs.segment[use]))
    dof = 6.0 * int(use.sum()) - float(np.trace(xx_inv @ zz)) - 3.0 * n_used_seg
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
