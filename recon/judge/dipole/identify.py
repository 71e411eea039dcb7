"""Identify each coil's effective dipole per amp from the satellite's motion.

Euler's equation ``J dw/dt + w x (J w) = (C i) x B + tau_gg + m_r x B + d`` integrated over an
interval ``[t1, t2]`` is linear in the nine entries of C::

    J (w(t2) - w(t1)) + int (w x J w) dt - int tau_gg dt = -int [B x] C i dt - int [B x] dt m_r + d (t2 - t1)

with ``[B x] C i = (i^T (x) [B x]) vec(C)`` (column-major vec, Kronecker product). The residual dipole
m_r (A m^2) and a constant disturbance torque d (N m) are optional extra unknowns.

Intervals. The evaluation instants (the control ticks) are grouped into short segments of about 30
instants. Within a segment starting at s, every instant t_j gives the equation over [s, t_j] with
J w(s) treated as one more unknown per segment, eliminated by demeaning within the segment
(Frisch-Waugh-Lovell). Every pair of instants in a segment is then an interval [t1, t2] of the
integrated equation, while each rate sample enters once; with white rate errors this is the
efficient use of the data, and segments keep slow model errors (disturbances, inertia) from
accumulating.

Integrals. The applied current is piecewise constant: the logged command held from its log
instant (shifted by the actuation latency), switched off inside the coil-off windows of windowed
sampling. Between consecutive switching instants ``int [B x] C i dt = [(F(b) - F(a)) x] C i`` with F
the antiderivative of a cubic spline through the body-frame field, so the duty cycle and any latency
enter exactly; ``w x J w`` and the gravity-gradient torque are integrated through their own splines.

Rate bias. Optionally the rate history is allowed a slowly varying bias e(t), piecewise linear in
time (``rate_bias_knot_s``). With ``w = w_hist - e`` the gyroscopic term, to first order in e, moves
``J e(t_j) + int G(w_hist) e dt`` to the right-hand side (G the Jacobian of ``w x J w``), which is
linear in the knot values. A gyro bias left wrong by the attitude estimator enters the equation
exactly this way, and a latency could otherwise imitate part of it.

Uncertainty. Weights come from the rate covariance when it is given (``J P J^T`` per instant); the
covariance of the solution is scaled by the residual variance (chi-square per degree of freedom)
and, when consecutive residuals are positively correlated, by the AR(1) variance inflation
(1 + rho) / (1 - rho); each variance is then replaced by the delete-one-block jackknife variance
where that is larger. Instants whose whitened residual exceeds the chi-square(3) 1 - 1e-4 quantile
are dropped once and the fit repeated.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 3.3.5 (Euler's equations), 3.3.6 (gravity-gradient torque).
Magnus, J. R. and Neudecker, H. (2019). Matrix Differential Calculus, 3rd ed., ch. 2
(vec(ABC) = (C^T (x) A) vec(B)).
Kunsch, H. R. (1989). The jackknife and the bootstrap for general stationary observations. Ann.
Statist. 17(3), 1217-1241 (block jackknife for dependent data).
Bayley, G. V. and Hammersley, J. M. (1946). The "effective" number of independent observations in
an autocorrelated time series. J. R. Stat. Soc. Suppl. 8(2), 184-197 (AR(1) variance inflation).
Frisch, R. and Waugh, F. V. (1933). Partial time regressions as compared with individual trends.
Econometrica 1(4), 387-401.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.stats import chi2

from ...core import MU_EARTH_m3_s2, held_values, in_off_window
from ..thresholds import MODEL_FLOOR_FRACTION, NO_RESPONSE_RATIO, OUTLIER_PROBABILITY, POLARITY_SIGMAS

__all__ = ["DipoleFit", "identify_dipole", "scan_actuation_latency", "classify_coil",
           "rate_bias_knots_s", "rate_bias_evidence"]

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


def _cross_matrices(v: np.ndarray) -> np.ndarray:
    """[v x] for each row of v: (N, 3) -> (N, 3, 3)."""
    z = np.zeros(len(v))
    return np.stack([np.stack([z, -v[:, 2], v[:, 1]], -1),
                     np.stack([v[:, 2], z, -v[:, 0]], -1),
                     np.stack([-v[:, 1], v[:, 0], z], -1)], axis=1)


@dataclass(frozen=True)
class _Motion:
    """Splines of the motion history, built once per pass and shared by all latency trials."""

    w: CubicSpline
    F_B: CubicSpline       # antiderivative of B (T s)
    F_gyro: CubicSpline    # antiderivative of w x J w (N m s)
    F_gg: CubicSpline | None
    F_w: CubicSpline       # antiderivative of w (rad)
    F_tw: CubicSpline      # antiderivative of t w (rad s)
    t_s: np.ndarray
    P: np.ndarray | None


def _motion(t_s, w_body_rad_s, b_body_nT, inertia, r_body_km, w_cov) -> _Motion:
    t = np.asarray(t_s, float)
    w = np.asarray(w_body_rad_s, float)
    b_T = np.asarray(b_body_nT, float) * 1e-9
    gyro = np.cross(w, w @ inertia.T)
    F_gg = None
    if r_body_km is not None:
        r = np.asarray(r_body_km, float) * 1e3
        rn = np.linalg.norm(r, axis=1, keepdims=True)
        tau_gg = 3.0 * MU_EARTH_m3_s2 / rn ** 5 * np.cross(r, r @ inertia.T)
        F_gg = CubicSpline(t, tau_gg).antiderivative()
    w_spline = CubicSpline(t, w)
    return _Motion(w_spline, CubicSpline(t, b_T).antiderivative(), CubicSpline(t, gyro).antiderivative(), F_gg,
                   w_spline.antiderivative(), CubicSpline(t, t[:, None] * w).antiderivative(), t, w_cov)


def _regressors(mot: _Motion, bounds_s: np.ndarray, t_coil_s: np.ndarray, i_coil_A: np.ndarray,
                latency_s: float, gate: tuple[np.ndarray, float, float] | None, max_hold_s: float):
    """Per interval: the current-dipole regressor (n, 3, 9), the residual-dipole one (n, 3, 3) and
    a validity flag (current known over the whole interval)."""
    t_on = np.asarray(t_coil_s, float) + latency_s
    t0, t1 = bounds_s[0], bounds_s[-1]
    inside = t_on[(t_on > t0) & (t_on < t1)]
    parts = [bounds_s, inside]
    if gate is not None:
        ticks, before, after = gate
        sel = ticks[(ticks > t0 - before - after - 1) & (ticks < t1 + before + after + 1)]
        parts += [sel - before, sel + after]
    ev = np.unique(np.concatenate(parts))
    ev = ev[(ev >= t0) & (ev <= t1)]
    a, b = ev[:-1], ev[1:]
    mid = 0.5 * (a + b)
    cur = held_values(t_on, i_coil_A, mid, max_age=max_hold_s)
    unknown = ~np.all(np.isfinite(cur), 1)
    cur[unknown] = 0.0
    if gate is not None:
        cur[in_off_window(mid, *gate)] = 0.0
    dF = mot.F_B(b) - mot.F_B(a)                       # (cells, 3) T s
    cell_int = np.searchsorted(bounds_s, mid, side="right") - 1
    n = len(bounds_s) - 1
    X = _cross_matrices(dF)                            # int [B x] dt over the cell
    # -int [B x] C i dt = -(i^T (x) int[B x] dt) vec(C)
    rows = -(cur[:, :, None, None] * X[:, None, :, :])  # (cells, 3 coils, 3, 3)
    rows = np.transpose(rows, (0, 2, 1, 3)).reshape(len(mid), 3, 9)
    # rows[:, r, 3 j + l] = -i_j [X]_{r l}: the coefficient of C[l, j], i.e. vec(C) column-major
    A_C = np.zeros((n, 3, 9))
    np.add.at(A_C, cell_int, rows)
    A_m = np.zeros((n, 3, 3))
    np.add.at(A_m, cell_int, -X)
    bad = np.zeros(n, bool)
    np.logical_or.at(bad, cell_int, unknown)
    return A_C, A_m, ~bad


def _interval_left_side(mot: _Motion, t_eval: np.ndarray) -> np.ndarray:
    """Per interval between consecutive evaluation instants: int (w x J w) dt - int tau_gg dt."""
    y = mot.F_gyro(t_eval[1:]) - mot.F_gyro(t_eval[:-1])
    if mot.F_gg is not None:
        y -= mot.F_gg(t_eval[1:]) - mot.F_gg(t_eval[:-1])
    return y


def rate_bias_knots_s(t0_s: float, t1_s: float, knot_spacing_s: float | None) -> np.ndarray | None:
    """Knots of the piecewise-linear rate bias: evenly spaced over ``[t0, t1]``, at most
    ``knot_spacing_s`` apart, at least two (a straight line); None when ``knot_spacing_s`` is None."""
    if knot_spacing_s is None:
        return None
    n = max(int(np.ceil((t1_s - t0_s) / knot_spacing_s - 1e-9)), 1) + 1
    return np.linspace(t0_s, t1_s, n)


def _rate_bias_regressors(mot: _Motion, t_eval: np.ndarray, inertia: np.ndarray, knots: np.ndarray):
    """Regressors of a piecewise-linear rate bias ``e(t) = sum_k phi_k(t) e_k`` (hat functions on
    ``knots``) in the levels form of the integrated equation.

    The rate history is ``w_hist = w + e``. Euler's equation in the true rate, expanded to first
    order in e (the gyroscopic term ``g(w) = w x J w`` has Jacobian ``G(w) = [w x] J - [(J w) x]``),
    moves the bias to the right-hand side as ``J e(t_j) + int_s^t_j G(w_hist) e dt``; with G linear
    in w, ``int G(w) phi_k dt = G(int phi_k w dt)``.

    Returns
    -------
    A_int : (n - 1, 3, 3 K) the integral part over each interval between evaluation instants
    A_lev : (n, 3, 3 K) the level part ``J phi_k(t_j)`` at each instant
    """
    nk = len(knots)
    inside = knots[(knots > t_eval[0]) & (knots < t_eval[-1])]
    ev = np.unique(np.concatenate([t_eval, inside]))
    a, b = ev[:-1], ev[1:]
    mid = 0.5 * (a + b)
    W0 = mot.F_w(b) - mot.F_w(a)                     # int w dt over the cell, rad
    W1 = mot.F_tw(b) - mot.F_tw(a)                   # int t w dt, rad s
    m = np.clip(np.searchsorted(knots, mid, side="right") - 1, 0, nk - 2)
    k0, k1 = knots[m], knots[m + 1]
    h = (k1 - k0)[:, None]
    Wk = ((k1[:, None] * W0 - W1) / h, (W1 - k0[:, None] * W0) / h)   # int phi_m w dt, int phi_m+1 w dt
    cell_int = np.searchsorted(t_eval, mid, side="right") - 1
    A_int = np.zeros((len(t_eval) - 1, 3, 3 * nk))
    for W, kk in zip(Wk, (m, m + 1), strict=True):
        G = _cross_matrices(W) @ inertia - _cross_matrices(W @ inertia.T)
        for c in range(3):
            np.add.at(A_int, (cell_int, slice(None), 3 * kk + c), G[:, :, c])
    phi = np.column_stack([np.interp(t_eval, knots, np.eye(nk)[k]) for k in range(nk)])   # (n, K)
    A_lev = (phi[:, :, None, None] * inertia[None, None, :, :]).transpose(0, 2, 1, 3).reshape(len(t_eval), 3, 3 * nk)
    return A_int, A_lev


def _segments(valid_interval: np.ndarray, segment_points: int) -> np.ndarray:
    """Segment label of each evaluation instant (-1: in no segment). A segment is a run of at most
    ``segment_points`` instants joined by valid intervals."""
    n = len(valid_interval) + 1
    label = np.full(n, -1)
    seg, count = -1, 0
    for k in range(n):
        joined = k > 0 and valid_interval[k - 1] and count < segment_points
        if joined:
            count += 1
        else:
            seg, count = seg + 1, 1
        label[k] = seg
    sizes = np.bincount(label)
    label[sizes[label] < 2] = -1
    _, label[label >= 0] = np.unique(label[label >= 0], return_inverse=True)
    return label


def _design(mot: _Motion, t_eval: np.ndarray, inertia: np.ndarray, t_coil_s, i_coil_A, latency_s, gate,
            max_hold_s, residual_dipole, torque_bias, segment_points, knots=None):
    """Levels form of the integrated equation within each segment (start instant s)::

        J w(t_j) + int_s^t_j (w x J w - tau_gg) dt = J w(s) + A_j theta + e_j

    Returns y (n, 3), A (n, 3, p), segment label (n,) (-1: unused instant)."""
    A_C, A_m, ok = _regressors(mot, t_eval, t_coil_s, i_coil_A, latency_s, gate, max_hold_s)
    blocks = [A_C]
    if residual_dipole:
        blocks.append(A_m)
    if torque_bias:
        blocks.append(np.broadcast_to(np.eye(3) * np.diff(t_eval)[:, None, None], (len(t_eval) - 1, 3, 3)))
    A_lev = None
    if knots is not None:
        A_e, A_lev = _rate_bias_regressors(mot, t_eval, inertia, knots)
        blocks.append(A_e)
        width_before = sum(blk.shape[2] for blk in blocks[:-1])
        A_lev = np.concatenate([np.zeros((len(t_eval), 3, width_before)), A_lev], axis=2)
    A_int = np.concatenate(blocks, axis=2)
    g_int = _interval_left_side(mot, t_eval)
    ok &= np.all(np.isfinite(g_int), axis=1) & np.all(np.isfinite(A_int), axis=(1, 2))
    A_int = np.where(ok[:, None, None], A_int, 0.0)
    g_int = np.where(ok[:, None], g_int, 0.0)
    label = _segments(ok, segment_points)
    A_cum = np.concatenate([np.zeros((1,) + A_int.shape[1:]), np.cumsum(A_int, axis=0)])
    g_cum = np.concatenate([np.zeros((1, 3)), np.cumsum(g_int, axis=0)])
    first = np.zeros(len(t_eval), int)
    used = label >= 0
    starts = np.nonzero(used & np.r_[True, label[1:] != label[:-1]])[0]
    first[used] = starts[label[used]]
    A = A_cum - A_cum[first]
    if A_lev is not None:
        A = A + A_lev - A_lev[first]
    y = mot.w(t_eval) @ inertia.T + g_cum - g_cum[first]
    return y, A, label


def _whiteners(mot: _Motion, t_eval: np.ndarray, inertia: np.ndarray) -> np.ndarray | None:
    """Inverse Cholesky factors (n, 3, 3) of J P J^T at each instant, or None (ordinary LS)."""
    if mot.P is None:
        return None
    idx = np.clip(np.searchsorted(mot.t_s, t_eval), 0, len(mot.t_s) - 1)
    S = inertia @ mot.P[idx] @ inertia.T
    S = 0.5 * (S + np.swapaxes(S, 1, 2))
    return np.linalg.inv(np.linalg.cholesky(S + 1e-30 * np.eye(3)))


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
                    rate_bias_knot_s: float | None = None,
                    _motion_cache: _Motion | None = None) -> DipoleFit | None:
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
    mot = _motion_cache or _motion(t_s, w_body_rad_s, b_body_nT, J, r_body_km, w_cov_rad2_s2)
    te = np.asarray(t_eval_s, float)
    te = te[(te >= mot.t_s[0]) & (te <= mot.t_s[-1])]
    if len(te) < 3:
        return None
    knots = rate_bias_knots_s(te[0], te[-1], rate_bias_knot_s)
    y, A, label = _design(mot, te, J, t_coil_s, i_coil_A, latency_s, gate, max_hold_s, residual_dipole,
                          torque_bias, segment_points, knots)
    Winv = _whiteners(mot, te, J)
    p = A.shape[2]
    keep = label >= 0

    def dof_of(keep_, nseg_):
        return 3 * int(keep_.sum()) - p - 3 * nseg_

    if keep.sum() < 3:
        return None
    lab_used = label
    theta, r, N, scale, nseg = _solve(y, A, label, Winv, keep)
    if dof_of(keep, nseg) < 3:
        return None
    s2 = float(np.sum(r * r) / dof_of(keep, nseg))
    # one pass of outlier rejection on whole instants
    d2 = np.sum(r * r, axis=1) / max(s2, 1e-300)
    out = d2 > chi2.ppf(1.0 - OUTLIER_PROBABILITY, 3)
    n_drop = int(out.sum()) if reject_outliers else 0
    if n_drop:
        keep2 = keep.copy()
        keep2[np.nonzero(keep)[0][out]] = False
        # relabel so that segments left with fewer than two instants drop out
        lab2 = np.where(keep2, label, -1)
        sizes = np.bincount(lab2[lab2 >= 0], minlength=int(label.max()) + 1)
        keep2 &= (lab2 >= 0) & (sizes[np.maximum(lab2, 0)] >= 2)
        lab2 = np.where(keep2, lab2, -1)
        _, lab2[keep2] = np.unique(lab2[keep2], return_inverse=True)
        if keep2.sum() < 3:
            return None
        theta, r, N, scale, nseg = _solve(y, A, lab2, Winv, keep2)
        keep, lab_used = keep2, lab2
        if dof_of(keep, nseg) < 3:
            return None
        s2 = float(np.sum(r * r) / dof_of(keep, nseg))
    wrss = float(np.sum(r * r))
    # AR(1) inflation from the lag-1 autocorrelation of the residual sequence (time order)
    rr = r - r.mean(axis=0)
    den = np.sum(rr * rr)
    rho = float(np.sum(rr[1:] * rr[:-1]) / den) if den > 0 and len(rr) > 2 else 0.0
    infl = (1.0 + rho) / (1.0 - rho) if 0.0 < rho < 0.99 else (199.0 if rho >= 0.99 else 1.0)
    dead = ~np.isfinite(scale)
    live = ~dead
    Ninv = np.zeros_like(N)
    try:
        Ninv[np.ix_(live, live)] = np.linalg.inv(N[np.ix_(live, live)])
    except np.linalg.LinAlgError:
        Ninv[np.ix_(live, live)] = np.linalg.pinv(N[np.ix_(live, live)])
    sc = np.where(live, scale, 1.0)
    cov = s2 * infl * Ninv / np.outer(sc, sc)
    cov[dead, :] = 0.0
    cov[:, dead] = 0.0
    cov[dead, dead] = np.inf
    var = np.diag(cov).copy()
    var_jk = _jackknife_variance(y, A, lab_used, Winv, keep, nseg, jackknife_blocks)
    if var_jk is not None:
        var = np.maximum(var, var_jk)
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
    e = e_sig = None
    if knots is not None:
        e = theta[k:].reshape(-1, 3)
        e_sig = np.sqrt(np.clip(var[k:], 0, None)).reshape(-1, 3)
    return DipoleFit(C, C_sigma, cov, m_r, d, int(keep.sum()), n_drop, s2, rho, wrss, float(latency_s),
                     knots, e, e_sig)


def scan_actuation_latency(t_s, w_body_rad_s, b_body_nT, inertia_kg_m2, t_coil_s, i_coil_A, t_eval_s,
                           period_s: float, *, max_latency_periods: int = 5, r_body_km=None,
                           w_cov_rad2_s2=None, gate=None, max_hold_s: float = 2.5,
                           rate_bias_knot_s: float | None = None
                           ) -> tuple[DipoleFit | None, np.ndarray, np.ndarray]:
    """Find the actuation latency that best explains the motion (profile least squares).

    The fit of :func:`identify_dipole` is repeated with the applied current delayed by trial
    latencies: whole control periods from -1 to ``max_latency_periods``, then quarter periods
    within one period of the best, then tenths within a fifth of a period of the best. All trials
    use the same instants (those valid for every trial) and no outlier rejection, so their weighted
    residual sums of squares compare directly.

    A current cannot flow before it is commanded, so the latency is sought among the trials of zero
    and more. The negative trials (down to one period) are a check on the time tags: they are
    refined the same way when one of them fits best, and a profile whose minimum lies there says
    that the coil log's times, or the rate history's, are in error (see ``judge``).

    Returns
    -------
    best : DipoleFit or None
        The best fit among the trials of zero or positive latency.
    latencies_s : (L,) trial latencies, s, sorted (negative ones included)
    wrss : (L,) weighted residual sum of squares of each trial (NaN where the fit failed)
    """
    J = np.asarray(inertia_kg_m2, float)
    mot = _motion(t_s, w_body_rad_s, b_body_nT, J, r_body_km, w_cov_rad2_s2)
    bounds = np.asarray(t_eval_s, float)
    lo = -period_s
    hi = max_latency_periods * period_s
    # keep only intervals whose current is known under every trial latency
    t_coil = np.asarray(t_coil_s, float)
    if len(t_coil) == 0 or len(bounds) < 3:
        return None, np.zeros(0), np.zeros(0)
    first_ok = t_coil[0] + hi
    last_ok = t_coil[-1] + lo + max_hold_s
    sel = (bounds >= first_ok) & (bounds <= last_ok)
    b2 = bounds[sel]
    if len(b2) < 3:
        return None, np.zeros(0), np.zeros(0)

    def fit(L: float) -> DipoleFit | None:
        return identify_dipole(t_s, w_body_rad_s, b_body_nT, J, t_coil_s, i_coil_A, b2, latency_s=L,
                               gate=gate, max_hold_s=max_hold_s, reject_outliers=False, jackknife_blocks=0,
                               rate_bias_knot_s=rate_bias_knot_s, _motion_cache=mot)

    trials: dict[float, DipoleFit | None] = {}
    for L in period_s * np.arange(-1, max_latency_periods + 1):
        trials[round(float(L), 9)] = fit(round(float(L), 9))

    def score(f: DipoleFit | None) -> float:
        return np.inf if f is None else f.wrss

    def refine(center: float, half_width: float, step: float) -> None:
        for L in center + period_s * np.arange(-half_width, half_width + 1e-9, step):
            L = round(float(np.clip(L, lo, hi)), 9)
            if not any(abs(L - x) < 1e-9 for x in trials):
                trials[L] = fit(L)

    def best_of(causal: bool) -> float:
        return min((L for L in trials if (L >= -1e-9) == causal), key=lambda L: score(trials[L]))

    # the profile can be shallow and bumpy between whole periods: search the two periods around the
    # best whole-period trial in quarter periods, then the best of those in tenths; the best causal
    # trial always, the best acausal one too when it beats it
    for half_width, step in ((1.0, 0.25), (0.2, 0.1)):
        refine(best_of(True), half_width, step)
        if score(trials[best_of(False)]) < score(trials[best_of(True)]):
            refine(best_of(False), half_width, step)
    lat = np.array(sorted(trials))
    wr = np.array([score(trials[L]) for L in lat])
    wr[~np.isfinite(wr)] = np.nan
    best = best_of(True)
    if not np.isfinite(score(trials[best])):
        return None, lat, wr
    return trials[best], lat, wr


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
    infl = (1 + fit_with.ar1) / (1 - fit_with.ar1) if 0 < fit_with.ar1 < 0.99 else 1.0
    unit = fit_with.chi2_per_dof * infl
    gain = (fit_without.wrss - fit_with.wrss) / unit if unit > 0 else float("inf")
    penalty = fit_with.rate_bias_rad_s.size * float(np.log(3 * fit_with.n_intervals))
    return bool(gain > penalty), float(gain), penalty


def classify_coil(c_est: float, c_sigma: float, c_nominal: float) -> tuple[str, float, float, float]:
    """Polarity of one coil from its estimated diagonal dipole per amp.

    With the ratio r = c_est / c_nominal and its total 1-sigma s (statistical, with the model floor
    ``MODEL_FLOOR_FRACTION`` added in quadrature), and the 3-sigma interval [r - 3 s, r + 3 s]:

    - "nominal" when the interval lies above 0 (a response of the nominal sign, at > 3 sigma);
    - "inverted" when it lies below 0;
    - "no_response" when it contains 0 and lies below 0.5 (consistent with no dipole and
      inconsistent, at > 3 sigma, with even half the nominal one);
    - "undetermined" otherwise (too uncertain to tell, typically a coil that hardly switched).

    Returns
    -------
    polarity : str
    confidence : float, in sigmas: from zero for nominal/inverted, from nominal for no_response, and
        |r| / s for undetermined
    ratio : float, r
    ratio_sigma : float, s
    """
    r = c_est / c_nominal
    s = float(np.hypot(c_sigma / abs(c_nominal), MODEL_FLOOR_FRACTION))
    lo, hi = r - POLARITY_SIGMAS * s, r + POLARITY_SIGMAS * s
    if lo > 0:
        return "nominal", abs(r) / s, r, s
    if hi < 0:
        return "inverted", abs(r) / s, r, s
    if hi < NO_RESPONSE_RATIO:
        return "no_response", (1.0 - r) / s, r, s
    return "undetermined", abs(r) / s, r, s
