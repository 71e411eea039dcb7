"""Least squares on the design, its uncertainty, and the identification of the coils' dipole per amp.

Uncertainty. Weights come from the rate covariance when it is given (``J P J^T`` per instant); the
covariance of the solution is scaled by the residual variance (chi-square per degree of freedom)
and, when consecutive residuals are positively correlated, by the AR(1) variance inflation
(1 + rho) / (1 - rho); each variance is then replaced by the delete-one-block jackknife variance
where that is larger. Instants whose whitened residual exceeds the chi-square(3) 1 - 1e-4 quantile
are dropped once and the fit repeated.

References
----------
Kunsch, H. R. (1989). The jackknife and the bootstrap for general stationary observations. Ann.
Statist. 17(3), 1217-1241 (block jackknife for dependent data).
Bayley, G. V. and Hammersley, J. M. (1946). The "effective" number of independent observations in
an autocorrelated time series. J. R. Stat. Soc. Suppl. 8(2), 184-197 (AR(1) variance inflation).
Frisch, R. and Waugh, F. V. (1933). Partial time regressions as compared with individual trends.
Econometrica 1(4), 387-401.
Schwarz, G. (1978). Estimating the dimension of a model. Ann. Statist. 6(2), 461-464.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.stats import chi2

from ..thresholds import OUTLIER_PROBABILITY
from .design import Design, design, rate_bias_knots_s, whiteners
from .motion import MotionSplines, motion_splines

__all__ = ["DipoleFit", "identify_dipole", "chi2_unit", "rate_bias_evidence"]


@dataclass(frozen=True)
class DipoleFit:
    """Effective dipole per amp identified from the motion.

    Attributes
    ----------
    C : (3, 3) A m^2 per A, m_body = C i
    C_sigma : (3, 3) statistical 1-sigma of each entry (the larger of the least-squares and the block
        jackknife one; infinite for a coil that never carried current), A m^2 per A
    cov : (p, p) least-squares covariance of all unknowns (vec(C) column-major, then m_r, then d)
    residual_dipole_Am2 : (3,) or None
    torque_bias_Nm : (3,) or None
    n_intervals : int, evaluation instants used
    n_dropped : int, instants dropped as outliers
    chi2_per_dof : float, weighted residual sum of squares per degree of freedom (with no rate
        covariance given: the residual variance, (N m s)^2)
    ar1 : float, lag-1 autocorrelation of the whitened residuals
    wrss : float, weighted residual sum of squares (before scaling)
    latency_s : float, actuation latency assumed for the applied current
    rate_bias_knots_s : (K,) knots of the rate history's piecewise-linear bias, s, or None
    rate_bias_rad_s : (K, 3) that bias at the knots (history minus motion), rad/s, body frame, or None
    rate_bias_sigma_rad_s : (K, 3) its least-squares 1-sigma, rad/s, or None
    inertia_shape, inertia_shape_sigma : (5,) coefficients of the inertia-shape directions and their
        1-sigma, kg m^2, or None; inertia_kg_m2 : (3, 3) the given inertia changed by them, or None
    """

    C: np.ndarray
    C_sigma: np.ndarray
    cov: np.ndarray
    residual_dipole_Am2: np.ndarray | None
    torque_bias_Nm: np.ndarray | None
    n_intervals: int
    n_dropped: int
    chi2_per_dof: float
    ar1: float
    wrss: float
    latency_s: float
    rate_bias_knots_s: np.ndarray | None = None
    rate_bias_rad_s: np.ndarray | None = None
    rate_bias_sigma_rad_s: np.ndarray | None = None
    inertia_shape: np.ndarray | None = None
    inertia_shape_sigma: np.ndarray | None = None
    inertia_kg_m2: np.ndarray | None = None


def _solve(y: np.ndarray, A: np.ndarray, label: np.ndarray, Winv: np.ndarray | None, keep: np.ndarray):
    """Least squares with one unknown initial momentum per segment, eliminated by (weighted)
    demeaning within the segment (Frisch-Waugh-Lovell). Returns theta, whitened residuals (n_kept, 3),
    the scaled normal matrix and the column scales."""
    lab = label[keep]
    y, A = y[keep], A[keep]
    nseg = int(lab.max()) + 1 if len(lab) else 0
    if Winv is None:
        cnt = np.bincount(lab, minlength=nseg)[:, None]
        ym = np.zeros((nseg, 3))
        np.add.at(ym, lab, y)
        Am = np.zeros((nseg,) + A.shape[1:])
        np.add.at(Am, lab, A)
        yt = y - (ym / cnt)[lab]
        At = A - (Am / cnt[:, :, None])[lab]
    else:
        Wk = Winv[keep]
        Sinv = np.swapaxes(Wk, 1, 2) @ Wk
        M = np.zeros((nseg, 3, 3))
        np.add.at(M, lab, Sinv)
        sy = np.zeros((nseg, 3))
        np.add.at(sy, lab, np.einsum("nij,nj->ni", Sinv, y))
        sA = np.zeros((nseg,) + A.shape[1:])
        np.add.at(sA, lab, Sinv @ A)
        Minv = np.linalg.inv(M)
        yt = np.einsum("nij,nj->ni", Wk, y - np.einsum("nij,nj->ni", Minv, sy)[lab])
        At = Wk @ (A - (Minv @ sA)[lab])
    p = A.shape[2]
    X = At.reshape(-1, p)
    scale = np.sqrt(np.sum(X * X, axis=0))
    # a column with no excitation (a coil that never carried current) has no information: its
    # unknown is left at zero with infinite variance (see identify_dipole)
    scale[scale == 0] = np.inf
    Xs = X / scale
    N = Xs.T @ Xs
    # normal equations on unit-norm columns: p is small (9 to 15) and the columns are scaled, so
    # this is as accurate as an orthogonal factorisation here and much faster on a busy machine
    theta_s = np.linalg.pinv(N, rcond=1e-12, hermitian=True) @ (Xs.T @ yt.ravel())
    theta = np.where(np.isfinite(scale), theta_s / np.where(np.isfinite(scale), scale, 1.0), 0.0)
    r = yt - np.einsum("nij,j->ni", At, theta)
    return theta, r, N, scale, nseg


def _jackknife_variance(y, A, label, Winv, keep, nseg: int, blocks: int) -> np.ndarray | None:
    """Delete-one-block jackknife variance of all unknowns, blocks of consecutive segments
    (Kunsch 1989). None when there are too few segments for ``blocks`` blocks."""
    if blocks < 2 or nseg < blocks:
        return None
    group = np.where(keep, (np.maximum(label, 0) * blocks) // nseg, -1)
    thetas = []
    for g in range(blocks):
        k2 = keep & (group != g)
        lab = np.where(k2, label, -1)
        _, lab[k2] = np.unique(lab[k2], return_inverse=True)
        th, *_ = _solve(y, A, lab, Winv, k2)
        thetas.append(th)
    th = np.array(thetas)
    return (blocks - 1) / blocks * np.sum((th - th.mean(axis=0)) ** 2, axis=0)


def identify_dipole(t_s: np.ndarray, w_body_rad_s: np.ndarray, b_body_nT: np.ndarray,
                    inertia_kg_m2: np.ndarray, t_coil_s: np.ndarray, i_coil_A: np.ndarray,
                    t_eval_s: np.ndarray, *, r_body_km: np.ndarray | None = None,
                    w_cov_rad2_s2: np.ndarray | None = None, latency_s: float = 0.0,
                    gate: tuple[np.ndarray, float, float] | None = None, max_hold_s: float = 2.5,
                    residual_dipole: bool = True, torque_bias: bool = True, segment_points: int = 31,
                    reject_outliers: bool = True, jackknife_blocks: int = 10,
                    rate_bias_knot_s: float | None = None, inertia_shape: bool = False,
                    motion: MotionSplines | None = None) -> DipoleFit | None:
    """Least-squares estimate of the coils' dipole-per-amp matrix C from the motion.

    The evaluation instants are grouped into short segments of up to ``segment_points`` instants
    (cut wherever the coil log or the motion history has a gap). Within a segment starting at s, each
    instant t_j gives the integrated equation over [s, t_j]; the unknown J w(s) of each segment is
    eliminated, which makes every pair of instants in the segment an interval [t1, t2] of the
    integrated equation while counting each rate sample once.

    Parameters
    ----------
    t_s : (N,) sorted times of the motion history, s
    w_body_rad_s : (N, 3) body rate relative to GCRF, rad/s, body frame
    b_body_nT : (N, 3) Earth's field in body axes, nT (attitude x reference field, or the calibrated
        magnetometer)
    inertia_kg_m2 : (3, 3)
    t_coil_s : (M,) sorted times of the coil log, s
    i_coil_A : (M, 3) logged coil currents, A (held until the next sample)
    t_eval_s : (n,) sorted instants at which the equation is evaluated, s (for example the control
        ticks)
    r_body_km : (N, 3), optional
        Position from the Earth's centre in body axes, km, for the gravity-gradient torque.
    w_cov_rad2_s2 : (N, 3, 3), optional
        Covariance of the rate, (rad/s)^2, for the weights.
    latency_s : float
        Actuation latency: the logged current flows from ``t_log + latency``.
    gate : (ticks_s, before_s, after_s), optional
        Coil-off windows of windowed sampling: no current flows inside ``[tick - before, tick + after]``.
    max_hold_s : float
        A logged current older than this is unknown (a gap in the coil log); segments are cut there.
    residual_dipole, torque_bias : bool
        Also estimate a constant residual dipole m_r (A m^2) and a constant torque d (N m).
    segment_points : int
        Most instants per segment.
    reject_outliers : bool
        Drop, once, the instants whose whitened residual exceeds the chi-square(3) quantile of
        ``1 - OUTLIER_PROBABILITY``, and fit again.
    jackknife_blocks : int
        The variance of each unknown is the larger of the least-squares one and the delete-one-block
        jackknife one over this many blocks of consecutive segments (0: least squares only). The
        jackknife catches what the least-squares variance cannot: estimates carried by a few
        instants (coils switching in lock-step) and model errors that vary along the pass.
    rate_bias_knot_s : float or None
        Also estimate a slowly varying bias of the rate history (piecewise linear, knots at most
        this far apart, see :func:`rate_bias_knots_s`); None: the rate history is taken as unbiased.
    inertia_shape : bool
        Also estimate the inertia's shape: its change in five directions that with the given
        inertia span the symmetric matrices, chosen so that the rate's noise cannot pull them
        (:func:`.motion.inertia_shape_basis`; its scale cannot be told from the dipoles'). The true
        inertia differs from the design values by a few percent, and at a few deg/s the error of
        ``w x J w`` is as large as the coil torque.
    motion : MotionSplines, optional
        The splines of this motion history when already built (a latency scan shares one set over
        all its trials); built here otherwise.

    Returns
    -------
    DipoleFit, or None when too few instants survive.

    References
    ----------
    Markley and Crassidis (2014), sec. 3.3.5; Bayley and Hammersley (1946); Frisch, R. and Waugh,
    F. V. (1933), Partial time regressions as compared with individual trends, Econometrica 1(4),
    387-401 (eliminating the per-segment constants by demeaning).
    """
    J = np.asarray(inertia_kg_m2, float)
    mot = motion or motion_splines(t_s, w_body_rad_s, b_body_nT, J, r_body_km, w_cov_rad2_s2)
    te = np.asarray(t_eval_s, float)
    te = te[(te >= mot.t_s[0]) & (te <= mot.t_s[-1])]
    if len(te) < 3:
        return None
    knots = rate_bias_knots_s(te[0], te[-1], rate_bias_knot_s)
    des = design(mot, te, J, t_coil_s, i_coil_A, latency_s, gate, max_hold_s, residual_dipole, torque_bias,
                 segment_points, knots, inertia_shape)
    Winv = whiteners(mot, te, J)
    keep = des.label >= 0
    if keep.sum() < 3:
        return None
    sol = _solution(des, Winv, keep, des.label)
    if sol is None:
        return None
    # one pass of outlier rejection on whole instants
    out = _outliers(sol) if reject_outliers else None
    n_drop = int(out.sum()) if out is not None else 0
    if n_drop:
        sol = _solution_without(des, Winv, sol, out)
        if sol is None:
            return None
    cov, rho = _covariance(sol)
    var = np.diag(cov).copy()
    var_jk = _jackknife_variance(des.y, des.A, sol.label, Winv, sol.keep, sol.n_segments, jackknife_blocks)
    if var_jk is not None:
        var = np.maximum(var, var_jk)
    fit = _dipole_fit(sol, cov, var, rho, n_drop, latency_s, knots, residual_dipole, torque_bias, inertia_shape)
    if inertia_shape:
        fit = replace(fit, inertia_kg_m2=J + np.einsum("k,kij->ij", fit.inertia_shape, mot.shape_basis))
    return fit


@dataclass(frozen=True)
class _Solution:
    """One least-squares solution: the unknowns, whitened residuals (n_kept, 3), scaled normal matrix
    and column scales (see :func:`_solve`), the instants and segment labels used, and the residual
    variance s2 (chi-square per degree of freedom)."""

    theta: np.ndarray
    r: np.ndarray
    N: np.ndarray
    scale: np.ndarray
    n_segments: int
    keep: np.ndarray
    label: np.ndarray
    s2: float


def _solution(des: Design, Winv: np.ndarray | None, keep: np.ndarray, label: np.ndarray) -> _Solution | None:
    """Least squares on the kept instants; None with fewer than three degrees of freedom."""
    theta, r, N, scale, nseg = _solve(des.y, des.A, label, Winv, keep)
    dof = 3 * int(keep.sum()) - des.A.shape[2] - 3 * nseg
    if dof < 3:
        return None
    return _Solution(theta, r, N, scale, nseg, keep, label, float(np.sum(r * r) / dof))


def _outliers(sol: _Solution) -> np.ndarray:
    """Kept instants whose whitened residual exceeds the chi-square(3) ``1 - OUTLIER_PROBABILITY`` quantile."""
    d2 = np.sum(sol.r * sol.r, axis=1) / max(sol.s2, 1e-300)
    return d2 > chi2.ppf(1.0 - OUTLIER_PROBABILITY, 3)


def _solution_without(des: Design, Winv: np.ndarray | None, sol: _Solution, out: np.ndarray) -> _Solution | None:
    """The fit again without the outlying instants ``out`` (over the kept ones); segments left with
    fewer than two instants drop out."""
    keep2 = sol.keep.copy()
    keep2[np.nonzero(sol.keep)[0][out]] = False
    lab2 = np.where(keep2, sol.label, -1)
    sizes = np.bincount(lab2[lab2 >= 0], minlength=int(sol.label.max()) + 1)
    keep2 &= (lab2 >= 0) & (sizes[np.maximum(lab2, 0)] >= 2)
    lab2 = np.where(keep2, lab2, -1)
    _, lab2[keep2] = np.unique(lab2[keep2], return_inverse=True)
    if keep2.sum() < 3:
        return None
    return _solution(des, Winv, keep2, lab2)


def _covariance(sol: _Solution) -> tuple[np.ndarray, float]:
    """Covariance of the unknowns, scaled by the residual variance and the AR(1) inflation from the
    lag-1 autocorrelation of the residual sequence (time order; Bayley and Hammersley 1946), and
    that autocorrelation. Unknowns without excitation get infinite variance."""
    r = sol.r
    rr = r - r.mean(axis=0)
    den = np.sum(rr * rr)
    rho = float(np.sum(rr[1:] * rr[:-1]) / den) if den > 0 and len(rr) > 2 else 0.0
    infl = (1.0 + rho) / (1.0 - rho) if 0.0 < rho < 0.99 else (199.0 if rho >= 0.99 else 1.0)
    dead = ~np.isfinite(sol.scale)
    live = ~dead
    Ninv = np.zeros_like(sol.N)
    try:
        Ninv[np.ix_(live, live)] = np.linalg.inv(sol.N[np.ix_(live, live)])
    except np.linalg.LinAlgError:
        Ninv[np.ix_(live, live)] = np.linalg.pinv(sol.N[np.ix_(live, live)])
    sc = np.where(live, sol.scale, 1.0)
    cov = sol.s2 * infl * Ninv / np.outer(sc, sc)
    cov[dead, :] = 0.0
    cov[:, dead] = 0.0
    cov[dead, dead] = np.inf
    return cov, rho


def _dipole_fit(sol: _Solution, cov: np.ndarray, var: np.ndarray, rho: float, n_drop: int, latency_s: float,
                knots: np.ndarray | None, residual_dipole: bool, torque_bias: bool, inertia_shape: bool) -> DipoleFit:
    """The unknowns read out of their layout: vec(C) column-major, then m_r, then d, then the
    inertia-shape coefficients (each when estimated), then the rate bias's knot values."""
    theta = sol.theta
    C = theta[:9].reshape(3, 3, order="F")
    C_sigma = np.sqrt(np.clip(var[:9], 0, None)).reshape(3, 3, order="F")
    k = 9
    m_r = d = None
    if residual_dipole:
        m_r = theta[k:k + 3]
        k += 3
    if torque_bias:
        d = theta[k:k + 3]
        k += 3
    p = p_sig = None
    if inertia_shape:
        p, p_sig = theta[k:k + 5], np.sqrt(np.clip(var[k:k + 5], 0, None))
        k += 5
    e = e_sig = None
    if knots is not None:
        e = theta[k:].reshape(-1, 3)
        e_sig = np.sqrt(np.clip(var[k:], 0, None)).reshape(-1, 3)
    return DipoleFit(C, C_sigma, cov, m_r, d, int(sol.keep.sum()), n_drop, sol.s2, rho, float(np.sum(sol.r * sol.r)),
                     float(latency_s), knots, e, e_sig, p, p_sig)


def chi2_unit(fit) -> float:
    """The chi-square unit of a fit's weighted residual sums: its residual variance with the AR(1)
    inflation (1 + rho) / (1 - rho) (Bayley and Hammersley 1946), so that differences of sums between
    nested or trial fits on the same instants read as chi-square. ``fit`` needs ``ar1`` and
    ``chi2_per_dof`` (a :class:`DipoleFit`)."""
    infl = (1 + fit.ar1) / (1 - fit.ar1) if 0 < fit.ar1 < 0.99 else 1.0
    return fit.chi2_per_dof * infl


def rate_bias_evidence(fit_without: DipoleFit | None, fit_with: DipoleFit | None) -> tuple[bool, float, float]:
    """Does the motion need a bias in the rate history? Schwarz's criterion on two nested fits.

    The bias model is chosen when its chi-square gain over the unbiased model exceeds ``k ln(m)``,
    with k its extra unknowns and m the scalar equations (three per instant). The chi-square unit
    is the bias fit's residual variance with its AR(1) inflation (as for the latency profile).

    Parameters
    ----------
    fit_without, fit_with : DipoleFit or None
        The same instants fitted without and with the rate bias (for example the best fits of two
        latency scans).

    Returns
    -------
    needed : bool
    delta_chi2 : float, chi-square gained by the bias unknowns (NaN when either fit is missing)
    penalty : float, k ln(m) (NaN when either fit is missing)

    References
    ----------
    Schwarz, G. (1978). Estimating the dimension of a model. Ann. Statist. 6(2), 461-464.
    """
    if fit_without is None or fit_with is None or fit_with.rate_bias_rad_s is None:
        return False, float("nan"), float("nan")
    unit = chi2_unit(fit_with)
    gain = (fit_without.wrss - fit_with.wrss) / unit if unit > 0 else float("inf")
    penalty = fit_with.rate_bias_rad_s.size * float(np.log(3 * fit_with.n_intervals))
    return bool(gain > penalty), float(gain), penalty
