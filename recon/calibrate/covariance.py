"""The covariance of the attitude-independent fit: statistical, systematic and consider terms.

The statistical part is ``s^2 (J^T J)^-1`` on the inlying samples, ``s^2`` their
residual variance (Seber & Wild 1989, Nonlinear Regression, sec. 2.1). It assumes independent
residuals, which the field the reference model leaves out (crustal and external, of the order of
100 nT, memory) breaks: that error is smooth along the orbit and, over a pass, acts like a slowly
drifting offset of ``h``. Its effect on the parameters is added as a systematic term
``A J^T Sigma_u J A`` (``A = (J^T J)^-1``), with ``Sigma_u`` the covariance of the magnitude error:
a Gaussian process with RMS ``unmodelled_nT / sqrt(3)`` (the component along the field of an
isotropic vector error) and a squared-exponential correlation of time scale ``unmodelled_time_s``
(the linearised error propagation of a least-squares estimator under a mis-specified error
covariance; Seber & Wild 1989 sec. 2.1; Rasmussen & Williams 2006, Gaussian Processes for Machine
Learning, eq. 2.31 for the kernel). On seeded synthetic passes with a smooth ~100 nT unmodelled
field the parameter errors divided by this sigma have an RMS near 1.

An outer fence on the residuals (5 robust sigma) keeps glitches out of all three terms.

References
----------
Seber, G. A. F. and Wild, C. J. (1989). Nonlinear Regression. Wiley, section 2.1.
Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine Learning. MIT Press.
Tapley, B. D., Schutz, B. E. and Born, G. H. (2004). Statistical Orbit Determination. Elsevier,
section 6.3 (consider covariance).
Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation. JASA 88,
1273-1283 (the 1.4826 MAD scale).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import robust_scale
from .model import N_PARAMS, PARAM_NAMES, jacobian, residual_nT

__all__ = ["OUTLIER_FENCE", "UNMODELLED_FIELD_nT", "UNMODELLED_TIME_s", "FitCovariance", "fit_covariance",
           "fixed_covariance_block", "consider_covariance"]

# Robust outer fence: samples with |r - median| > 5 x (1.4826 MAD) are left out of the covariance
# (1.4826 MAD is the normal-consistent scale estimate; Rousseeuw & Croux 1993, JASA 88:1273).
OUTLIER_FENCE = 5.0
# The field IGRF leaves out: crustal and external fields of ~100 nT in quiet conditions (memory).
UNMODELLED_FIELD_nT = 100.0
# Its correlation time along a LEO track: features of ~1500 km at 7.6 km/s (common practice, no source).
UNMODELLED_TIME_s = 200.0


@dataclass(frozen=True)
class FitCovariance:
    """Result of :func:`fit_covariance`.

    Attributes
    ----------
    covariance : (18, 18) array
        Statistical + systematic + consider; NaN rows and columns for the parameters not estimated.
    statistical : (18, 18) array
        The statistical part alone, ``s^2 (J^T J)^-1``.
    residual_variance_nT2 : float
        ``s^2``, nT^2: the residual variance of the inliers, degrees of freedom removed.
    inliers : (N,) bool array
        Rows inside the outlier fence.
    """

    covariance: np.ndarray
    statistical: np.ndarray
    residual_variance_nT2: float
    inliers: np.ndarray


def fixed_covariance_block(fixed, fixed_covariance) -> np.ndarray:
    """Covariance (18x18) of the values held ``fixed``: the one they came with (NaN read as zero) on
    their rows and columns, zero elsewhere (and everywhere when none came)."""
    c = np.zeros((N_PARAMS, N_PARAMS))
    if fixed_covariance is not None and fixed:
        idx = [PARAM_NAMES.index(name) for name in fixed]
        sub = np.asarray(fixed_covariance, dtype=float)[np.ix_(idx, idx)]
        c[np.ix_(idx, idx)] = np.where(np.isfinite(sub), sub, 0.0)
    return c


def consider_covariance(undetermined, fixed_block, bound) -> np.ndarray:
    """Covariance (18x18) of the parameters that are held rather than estimated: an undetermined one
    may lie anywhere in its plausible range (1-sigma = ``bound``); a fixed one has the covariance it
    came with (``fixed_block``; fixed and undetermined parameters never overlap)."""
    c = fixed_block.copy()
    for name in undetermined:
        k = PARAM_NAMES.index(name)
        c[k, k] = bound[k] ** 2
    return c


def fit_covariance(p: np.ndarray, free: np.ndarray, m_sensor_nT: np.ndarray, h_nT: np.ndarray,
                   i_coil_A: np.ndarray, t_s: np.ndarray | None, unmodelled_nT: float, unmodelled_time_s: float,
                   consider: np.ndarray | None = None) -> FitCovariance:
    """Statistical + systematic + consider covariance (18x18, NaN outside ``free``) of the fit at
    ``p``, with the residual variance and the inlier mask.

    ``t_s`` (s, any origin) None, or ``unmodelled_nT`` 0, leaves the systematic term out; ``consider``
    (18x18) is the covariance of the held parameters (:func:`consider_covariance`).

    The consider term carries the uncertainty of the parameters held fixed (``consider``, their
    covariance) into the estimated ones: ``G C_x G^T`` with ``G = (J_f^T J_f)^-1 J_f^T J_x``, the
    sensitivity of the least-squares estimate to an error in the held values (Tapley, Schutz & Born
    2004, Statistical Orbit Determination, sec. 6.3, consider covariance)."""
    m, h, i = m_sensor_nT, h_nT, i_coil_A
    r = residual_nT(p, m, h, i)
    med, scale = np.median(r), robust_scale(r)
    inliers = np.abs(r - med) <= OUTLIER_FENCE * max(scale, 1e-9)
    n_free = int(free.sum())
    dof = max(int(inliers.sum()) - n_free, 1)
    s2 = float(np.sum(r[inliers] ** 2) / dof)
    cov = np.full((N_PARAMS, N_PARAMS), np.nan)
    cov_stat = cov.copy()
    if n_free:
        jac = jacobian(p, m[inliers], i[inliers])[:, free]
        norms = np.linalg.norm(jac, axis=0)
        norms[norms == 0] = 1.0
        jn = jac / norms
        a_n = np.linalg.pinv(jn.T @ jn, hermitian=True)
        c_n = s2 * a_n
        cov_stat[np.ix_(free, free)] = c_n / np.outer(norms, norms)
        if t_s is not None and unmodelled_nT > 0:
            t = np.asarray(t_s, dtype=float)[inliers]
            c_n = c_n + _smooth_error_cov(jn, t, unmodelled_nT / np.sqrt(3.0), unmodelled_time_s, a_n)
        if consider is not None and np.any(consider[~free][:, ~free] != 0):
            jx = jacobian(p, m[inliers], i[inliers])[:, ~free]
            g = a_n @ (jn.T @ jx)
            c_n = c_n + g @ consider[np.ix_(~free, ~free)] @ g.T
        cov[np.ix_(free, free)] = c_n / np.outer(norms, norms)
    return FitCovariance(cov, cov_stat, s2, inliers)


def _smooth_error_cov(jn: np.ndarray, t_s: np.ndarray, sigma_nT: float, tau_s: float,
                      a_n: np.ndarray) -> np.ndarray:
    """``A J^T Sigma_u J A`` for a smooth magnitude error (squared-exponential, RMS ``sigma_nT``,
    time scale ``tau_s``). Rows of ``J`` are summed into bins of tau/10, over which the kernel is
    nearly constant (at most 0.5 % change between neighbouring bins)."""
    width = tau_s / 10.0
    b = np.floor((t_s - t_s.min()) / width).astype(int)
    nb = int(b.max()) + 1
    jb = np.zeros((nb, jn.shape[1]))
    np.add.at(jb, b, jn)
    tb = (np.arange(nb) + 0.5) * width
    kern = sigma_nT**2 * np.exp(-0.5 * ((tb[:, None] - tb[None, :]) / tau_s) ** 2)
    return a_n @ (jb.T @ kern @ jb) @ a_n
