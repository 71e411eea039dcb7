"""Attitude with no prior: Wahba's problem over an opening window, one magnetometer plus the gyro.

A single field vector fixes only two of the three attitude angles at one instant. Over a window the
gyro carries every body-frame sample back to the window's first instant (``A(t_i) = Delta_i A0``,
so ``A0 b_ref(t_i) = Delta_i^T b_i``), and because the field direction turns in the inertial frame
as the satellite moves along its orbit, the pairs ``(Delta_i^T b_i, b_ref(t_i))`` fix A0 completely.
Davenport's q-method solves the weighted Wahba problem; a least-squares refinement from several
starts about the field direction then estimates A0 and a constant gyro bias together, since a bias
of 0.2 deg/s integrates to tens of degrees over such a window and the cost has more than one minimum.

References
----------
Wahba, G. (1965). A least squares estimate of satellite attitude. SIAM Review 7(3), 409.
Davenport, P. B. (1968). A vector approach to the algebra of rotations with applications.
NASA TN D-4696 (the q-method) (memory).
Keat, J. (1977). Analysis of least-squares attitude determination routine DOAOP. Computer Sciences
Corp. CSC/TM-77/6034 (the q-method in its usual published form) (memory).
Shuster, M. D. and Oh, S. D. (1981). Three-axis attitude determination from vector observations.
J. Guidance 4(1), 70-77 (QUEST; the attitude covariance of the Wahba solution).
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 5.3 (q-method), 5.5 (covariance of the Wahba solution).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from numba import njit
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from ..core import scipy_from_shuster_quaternion
from .kernels import qmul, qnormalize, quat_from_rotvec
from .types import OpeningFit

__all__ = ["WahbaSolution", "davenport_q_method", "InitialState",
           "initial_state_with_gyro", "integrate_gyro", "carry_back_with_gyro"]


@dataclass(frozen=True)
class WahbaSolution:
    """Result of :func:`davenport_q_method`.

    Attributes
    ----------
    q_body_from_gcrf : (4,) scalar-last, scipy convention
    loss : float
        Wahba's loss ``1/2 sum a_i |b_i - A r_i|^2`` at the solution (unit vectors).
    covariance_rad2 : (3, 3)
        Attitude-error covariance in body axes, ``[sum a_i (I - b_i b_i^T)]^-1`` (Markley &
        Crassidis 2014 sec. 5.5), with a_i = 1 / sigma_i^2 (rad^-2); infinite when the vectors are
        all parallel.
    """

    q_body_from_gcrf: np.ndarray
    loss: float
    covariance_rad2: np.ndarray


def davenport_q_method(b_body: np.ndarray, r_ref: np.ndarray, sigma_rad: np.ndarray | float) -> WahbaSolution:
    """Davenport's q-method for Wahba's problem ``min sum a_i |b_i - A r_i|^2``.

    Parameters
    ----------
    b_body : (N, 3) observed directions, body frame (normalised here)
    r_ref : (N, 3) reference directions, GCRF (normalised here)
    sigma_rad : float or (N,) angular 1-sigma of each observation, rad (weights a_i = 1/sigma_i^2)

    Returns
    -------
    WahbaSolution

    References
    ----------
    Davenport (1968); Keat (1977); Markley & Crassidis (2014) sec. 5.3 (the K matrix; section from memory).
    """
    b = np.asarray(b_body, float)
    r = np.asarray(r_ref, float)
    b = b / np.linalg.norm(b, axis=1, keepdims=True)
    r = r / np.linalg.norm(r, axis=1, keepdims=True)
    a = np.broadcast_to(1.0 / np.asarray(sigma_rad, float) ** 2, (len(b),))
    bm = np.einsum("i,ij,ik->jk", a, b, r)  # B = sum a_i b_i r_i^T
    s = bm + bm.T
    sigma = np.trace(bm)
    z = np.array([bm[1, 2] - bm[2, 1], bm[2, 0] - bm[0, 2], bm[0, 1] - bm[1, 0]])
    k = np.empty((4, 4))
    k[:3, :3] = s - sigma * np.eye(3)
    k[:3, 3] = z
    k[3, :3] = z
    k[3, 3] = sigma
    vals, vecs = np.linalg.eigh(k)
    q = scipy_from_shuster_quaternion(vecs[:, -1])
    loss = float(a.sum() - vals[-1])
    info = np.einsum("i,jk->jk", a, np.eye(3)) - np.einsum("i,ij,ik->jk", a, b, b)
    try:
        cov = np.linalg.inv(info)
        if not np.all(np.isfinite(cov)) or np.linalg.cond(info) > 1e12:
            raise np.linalg.LinAlgError
    except np.linalg.LinAlgError:
        cov = np.full((3, 3), np.inf)
    return WahbaSolution(q, loss, cov)


@njit(cache=True)
def integrate_gyro(t_gyro, w_gyro, bias, t_query):
    """Body-to-body rotations Delta(t) with ``A(t) = Delta(t) A(t_query[0])`` from the gyro.

    The rate of gyro sample j (minus ``bias``) is held from t_gyro[j] to the next sample (the same
    rule as the filter). Returns (M, 4) quaternions at the (increasing) ``t_query`` times.
    """
    mq = t_query.shape[0]
    out = np.empty((mq, 4))
    dq = np.array([0.0, 0.0, 0.0, 1.0])
    tcur = t_query[0]
    j = np.searchsorted(t_gyro, tcur, side="right") - 1
    if j < 0:
        j = 0
    for i in range(mq):
        tq = t_query[i]
        while tcur < tq:
            tnext = t_gyro[j + 1] if j + 1 < t_gyro.shape[0] else tq
            if tnext > tq:
                tnext = tq
            dt = tnext - tcur
            if dt > 0.0:
                wx = w_gyro[j, 0] - bias[0]
                wy = w_gyro[j, 1] - bias[1]
                wz = w_gyro[j, 2] - bias[2]
                dq = qmul(quat_from_rotvec(-wx * dt, -wy * dt, -wz * dt), dq)
            tcur = tnext
            if j + 1 < t_gyro.shape[0] and tcur >= t_gyro[j + 1]:
                j += 1
        out[i, :] = qnormalize(dq)
    return out


@dataclass(frozen=True)
class InitialState:
    """Starting point of the filter at ``t_s`` (seconds on the filter's time axis).

    Attributes
    ----------
    q_body_from_gcrf : (4,)
    v : (3,) gyro bias (rad/s, gyro mode) or body rate (rad/s, dynamics mode)
    sigma_att_rad : (3,) 1-sigma attitude error per body axis used for P0
    sigma_v : (3,) 1-sigma of v used for P0
    method : str
    window_s : float
    fit : OpeningFit or None, figures of the fit that found it
    carried_back_s : float or None, how far it was carried back from where it was solved, s (None: not
        carried back)
    """

    q_body_from_gcrf: np.ndarray
    v: np.ndarray
    sigma_att_rad: np.ndarray
    sigma_v: np.ndarray
    method: str
    window_s: float
    fit: OpeningFit | None = None
    carried_back_s: float | None = None


def _window(t_mag: np.ndarray, b_ref: np.ndarray, t0: float, min_window_s: float, max_window_s: float,
            min_turn_rad: float) -> float:
    """Shortest window from t0 (>= min_window_s) over which the reference field turns min_turn_rad."""
    r = b_ref / np.linalg.norm(b_ref, axis=1, keepdims=True)
    ang = np.arccos(np.clip(r @ r[0], -1.0, 1.0))
    later = np.nonzero((ang >= min_turn_rad) & (t_mag - t0 >= min_window_s))[0]
    if len(later):
        return float(min(max(t_mag[later[0]] - t0, min_window_s), max_window_s))
    return float(min(t_mag[-1] - t0, max_window_s))


def _subsample(n: int, n_max: int) -> np.ndarray:
    return np.unique(np.linspace(0, n - 1, min(n, n_max)).round().astype(int))


def initial_state_with_gyro(t_mag: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray,
                            t_gyro: np.ndarray, w_gyro: np.ndarray, *, sigma_vec_nT: float,
                            sigma_bias0_rad_s: float, window_s: float = 120.0,
                            max_window_s: float = 1800.0, min_turn_deg: float = 45.0,
                            n_starts: int = 8, first_s: float = 20.0,
                            floor_att_rad: float = np.deg2rad(3.0),
                            floor_bias_rad_s: float = np.deg2rad(0.05)) -> InitialState:
    """Attitude and gyro bias at t_mag[0] from the opening window, no prior needed.

    The window is at least ``window_s`` long and is stretched (up to ``max_window_s``) until the
    reference field has turned ``min_turn_deg`` in GCRF, so that the rotation about the field is
    fixed. Steps:

    1. Davenport's q-method on the first ``first_s`` seconds, the body vectors carried back with the
       gyro (zero bias): two angles are good, the rotation about the field is barely determined
       because the field has hardly turned yet.
    2. ``n_starts`` starts spread evenly about the reference field direction (GCRF), each refined by
       least squares on A0 and a constant bias over the whole window.
    3. The start with the smallest cost wins.

    Step 2 matters: the cost in (A0, bias) has several minima (an error about the field axis traded
    against a bias that turns the body vectors the other way). A single start, refined first over
    30 s (where the rotation about the field is not yet determined) and then over the window, ended
    in a wrong minimum 30-170 deg off in 15 of 120 simulated detumble openings, although its fit was
    visibly worse (residual 130-310 nT against 100-120 nT at the right one). Eight starts refined
    directly over the whole window found the right one in all 120; the right basin spans about half
    the circle about the field, so three to eight of the eight starts end in it.

    The starting covariance is the least-squares covariance scaled up by the number of vectors (the
    field-model error is correlated over the whole window, so the vectors are not independent),
    floored at ``floor_att_rad`` and ``floor_bias_rad_s`` (common practice, no source: a start a few
    degrees off is well inside the filter's linear range).

    Parameters
    ----------
    t_mag : (N,) s; b_body_nT : (N, 3) nT body; b_ref_nT : (N, 3) nT GCRF
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body
    sigma_vec_nT : float, 1-sigma per axis of one field vector (sensor plus field model), nT
    sigma_bias0_rad_s : float, prior 1-sigma of the gyro bias (weights the bias in the fit)
    n_starts : int, starts about the field direction (at least 1)
    first_s : float, length of the q-method window of step 1, s
    """
    t0 = float(t_mag[0])
    w = _window(t_mag, b_ref_nT, t0, window_s, max_window_s, np.deg2rad(min_turn_deg))
    inwin = np.nonzero(t_mag <= t0 + w)[0]
    idx = inwin[_subsample(len(inwin), 400)]
    if idx[0] != 0:
        idx = np.r_[0, idx]
    tq, bq, rq = t_mag[idx], b_body_nT[idx], b_ref_nT[idx]
    bmag = float(np.median(np.linalg.norm(bq, axis=1)))
    sig_ang = sigma_vec_nT / bmag

    first = np.nonzero(tq <= t0 + min(first_s, w))[0]
    if len(first) < 2:
        first = np.arange(min(2, len(tq)))
    d0 = Rotation.from_quat(integrate_gyro(t_gyro, w_gyro, np.zeros(3), tq[first]))
    a_first = Rotation.from_quat(davenport_q_method(d0.inv().apply(bq[first]), rq[first], sig_ang).q_body_from_gcrf)
    axis = rq[first].mean(axis=0)
    axis = axis / np.linalg.norm(axis)

    def residuals(p, sel, a_ref):
        a = Rotation.from_rotvec(-p[:3]) * a_ref
        dq = Rotation.from_quat(integrate_gyro(t_gyro, w_gyro, p[3:], tq[sel]))
        pred = (dq * a).apply(rq[sel])
        res = ((pred - bq[sel]) / sigma_vec_nT).ravel()
        return np.r_[res, p[3:] / sigma_bias0_rad_s]

    whole = np.arange(len(tq))
    costs = []
    best = None
    for j in range(max(int(n_starts), 1)):
        # A0 R_axis(phi) leaves A0 r unchanged for r along the axis: the same first-window fit, another
        # rotation about the field
        a_ref = a_first * Rotation.from_rotvec(axis * 2.0 * np.pi * j / max(int(n_starts), 1))
        fit = least_squares(residuals, np.zeros(6), args=(whole, a_ref), method="lm",
                            x_scale=np.r_[np.full(3, 0.05), np.full(3, 1e-3)])
        costs.append(float(fit.cost))
        if best is None or fit.cost < best[0].cost:
            best = (fit, a_ref)
    fit, a0 = best
    p = fit.x
    jac = fit.jac
    try:
        cov = np.linalg.inv(jac.T @ jac)
    except np.linalg.LinAlgError:
        cov = np.diag(np.r_[np.full(3, np.inf), np.full(3, sigma_bias0_rad_s ** 2)])
    scale = len(tq)  # vectors are correlated through the field-model error: count them as one
    s_att = np.sqrt(np.clip(np.diag(cov)[:3] * scale, 0.0, None))
    s_b = np.sqrt(np.clip(np.diag(cov)[3:] * scale, 0.0, None))
    s_att = np.maximum(np.nan_to_num(s_att, nan=np.pi, posinf=np.pi), floor_att_rad)
    s_b = np.minimum(np.maximum(np.nan_to_num(s_b, nan=sigma_bias0_rad_s, posinf=sigma_bias0_rad_s),
                                floor_bias_rad_s), sigma_bias0_rad_s)
    q0 = (Rotation.from_rotvec(-p[:3]) * a0).as_quat()
    rms = float(np.sqrt(np.mean(residuals(p, whole, a0)[:-3] ** 2)) * sigma_vec_nT)
    agree = int(sum(c <= 1.01 * costs[int(np.argmin(costs))] for c in costs))
    return InitialState(q0 if q0[3] >= 0 else -q0, p[3:].copy(), s_att, s_b, "multi-start q-method+gyro-bias-lsq", w,
                        OpeningFit(int(len(tq)), rms, len(costs), agree, float(np.rad2deg(np.arccos(np.clip(
                            rq[0] @ rq[-1] / np.linalg.norm(rq[0]) / np.linalg.norm(rq[-1]), -1, 1))))))


def carry_back_with_gyro(init: InitialState, t_from_s: float, t_to_s: float, t_gyro: np.ndarray,
                         w_gyro: np.ndarray, arw_rad_sqrt_s: float) -> InitialState:
    """An opening state solved at ``t_from_s``, moved back to ``t_to_s <= t_from_s`` along the gyro.

    The filter starts at its first step, which can come before the first usable magnetometer row
    (its field or its reference field missing); the state there is the solved attitude carried back
    with the gyro less the solved bias, ``A(t_to) = Delta^T A(t_from)`` (``Delta`` from
    :func:`integrate_gyro`). Over the gap ``g`` the attitude sigma grows, the same about every axis
    because the body axes turn in between, to ``sqrt(max sigma_att^2 + (max sigma_bias g)^2 + arw^2 g)``.

    Parameters
    ----------
    init : InitialState at t_from_s (v is the gyro bias, rad/s body)
    t_from_s, t_to_s : float, s on the gyro's time axis
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body
    arw_rad_sqrt_s : float, angle random walk, rad/sqrt(s)

    Returns
    -------
    InitialState at t_to_s (``carried_back_s`` = the gap)
    """
    gap = float(t_from_s - t_to_s)
    if gap <= 0.0:
        return dataclasses.replace(init, carried_back_s=0.0)
    d = Rotation.from_quat(integrate_gyro(t_gyro, w_gyro, np.asarray(init.v, float),
                                          np.array([t_to_s, t_from_s]))[-1])
    q = (d.inv() * Rotation.from_quat(init.q_body_from_gcrf)).as_quat()
    s = np.sqrt(np.max(init.sigma_att_rad ** 2) + (np.max(init.sigma_v) * gap) ** 2 + arw_rad_sqrt_s ** 2 * gap)
    return dataclasses.replace(init, q_body_from_gcrf=q if q[3] >= 0 else -q, sigma_att_rad=np.full(3, s),
                               carried_back_s=gap)
