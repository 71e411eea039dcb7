"""The opening state of dynamics mode: attitude and body rate at the filter's first step.

From the magnetometer alone: several starts about the field direction, each refined by least squares
with Euler's equations over the opening window (Psiaki, Martel & Pal 1990). Over a short window the
field hardly turns in GCRF, so the rotation about it is weakly determined and the least squares can
have more than one minimum with nearly the same cost; every distinct minimum is kept as a candidate
and the forward filter, run over the whole pass from each, chooses by its likelihood. Or from the
gyro while it was still alive, when it died only later in the pass. Either is solved at the first
usable row and carried back to the filter's first step with Euler's equations.

References
----------
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics and Euler's equations).
Savitzky, A. and Golay, M. J. E. (1964). Smoothing and differentiation of data by simplified least
squares procedures. Anal. Chem. 36(8), 1627-1639 (the local-slope derivative) (memory).
"""

from __future__ import annotations

import dataclasses

import numpy as np
from numba import njit
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from ..core import NS_PER_S, RAD_PER_DEG, cross_matrices, local_slope
from .gyro_check import GyroCheck
from .initial import InitialState, davenport_q_method, initial_state_with_gyro
from .kernels import P_J, P_SIGTAU, rk4_rigid_body
from .types import NoiseModel, OpeningFit, PassInputs

__all__ = ["propagate_rigid_body", "opening_candidates", "distinct_openings", "carry_back_with_dynamics",
           "gyro_seeded_start", "DISTINCT_DEG"]

# Two minima of the opening fit are distinct when their attitudes differ by more than this: well
# outside the opening's own uncertainty floor (5 deg), well inside the spacing of the starts (30 deg)
# (common practice, no source).
DISTINCT_DEG = 10.0


@njit(cache=True)
def propagate_rigid_body(q0, w0, t, m_body, b_ref, r_km, prm, nsub):
    """Attitude and rate along t (K,) from (q0, w0) at t[0] with Euler's equations and RK4.

    m_body (K, 3): dipole held over [t_k, t_k+1]; b_ref (K, 3) nT and r_km (K, 3): GCRF field and
    position at t_k. ``nsub`` RK4 sub-steps per interval. Returns q (K, 4), w (K, 3).
    """
    kk = t.shape[0]
    qo = np.empty((kk, 4))
    wo = np.empty((kk, 3))
    q = q0.copy()
    w = w0.copy()
    qo[0, :] = q
    wo[0, :] = w
    for k in range(kk - 1):
        dt = (t[k + 1] - t[k]) / nsub
        for s in range(nsub):
            f0 = s / nsub
            f1 = (s + 1.0) / nsub
            b0 = b_ref[k] + f0 * (b_ref[k + 1] - b_ref[k])
            b1 = b_ref[k] + f1 * (b_ref[k + 1] - b_ref[k])
            r0 = r_km[k] + f0 * (r_km[k + 1] - r_km[k])
            r1 = r_km[k] + f1 * (r_km[k + 1] - r_km[k])
            q, w = rk4_rigid_body(q, w, dt, m_body[k], b0, b1, r0, r1, prm)
        qo[k + 1, :] = q
        wo[k + 1, :] = w
    return qo, wo


def _first_guess(t: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray, sigma_vec_nT: float):
    """Rate from ``db/dt = [b x] w`` over the first 6 s (the field's own turning, about twice the
    orbital rate, neglected) and attitude from the q-method on the first 10 s carried back with it."""
    t0 = t[0]
    first = np.nonzero(t - t0 <= 6.0)[0]
    bdot = local_slope(t[first], b_body_nT[first], 1.0)
    ok = np.all(np.isfinite(bdot), axis=1)
    w_guess, *_ = np.linalg.lstsq(cross_matrices(b_body_nT[first][ok]).reshape(-1, 3), bdot[ok].ravel(), rcond=None)
    sel10 = np.nonzero(t - t0 <= 10.0)[0]
    dq = Rotation.from_rotvec(-np.outer(t[sel10] - t0, w_guess))
    sol = davenport_q_method(dq.inv().apply(b_body_nT[sel10]), b_ref_nT[sel10], sigma_vec_nT / 3e4)
    return w_guess, Rotation.from_quat(sol.q_body_from_gcrf)


def _coarse_grid(t: np.ndarray, m_steps: np.ndarray, window_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Rows of a 0.5 s grid over the window (RK4 at 0.5 s is exact to ~(w dt)^5 at these rates) and the
    mean dipole over each coarse interval."""
    win = np.nonzero(t - t[0] <= window_s)[0]
    step = max(1, int(round(0.5 / max(float(np.median(np.diff(t[win]))), 1e-3))))
    grid = win[::step]
    dtf = np.diff(t[win[0]:grid[-1] + 1])
    mw = np.zeros((len(grid), 3))
    for j in range(len(grid) - 1):
        a, b = grid[j] - win[0], grid[j + 1] - win[0]
        mw[j] = (m_steps[win[0] + a:win[0] + b] * dtf[a:b, None]).sum(0) / dtf[a:b].sum()
    mw[-1] = mw[-2] if len(grid) > 1 else 0.0
    return grid, mw


def _distinct(found: list, limit: int) -> list:
    """The fits (cost, rotation, ...) sorted by cost, keeping only those DISTINCT_DEG from every better one."""
    kept = []
    for f in sorted(found, key=lambda f: f[0]):
        if all(np.rad2deg((f[1] * k[1].inv()).magnitude()) > DISTINCT_DEG for k in kept):
            kept.append(f)
        if len(kept) == limit:
            break
    return kept


def _candidate(cost: float, att: Rotation, fit, n: int, span_s: float, n_starts: int, sigma_vec_nT: float,
               floor_att_rad: float, floor_rate_rad_s: float) -> InitialState:
    """One minimum of the opening fit as an InitialState; its covariance, scaled by the number of vectors
    (correlated field-model error) and floored, gives P0."""
    try:
        cov = np.linalg.inv(fit.jac.T @ fit.jac) * n
    except np.linalg.LinAlgError:
        cov = np.diag(np.r_[np.full(3, np.pi ** 2), np.full(3, (1.0 * RAD_PER_DEG) ** 2)])
    q0 = att.as_quat()
    d = np.nan_to_num(np.sqrt(np.clip(np.diag(cov), 0.0, None)), nan=np.pi, posinf=np.pi)
    rms = float(np.sqrt(2.0 * cost / len(fit.fun)) * sigma_vec_nT)
    return InitialState(q0 if q0[3] >= 0 else -q0, fit.x[3:].copy(), np.maximum(d[:3], floor_att_rad),
                        np.maximum(d[3:], floor_rate_rad_s), "multi-start-dynamics-lsq", span_s,
                        OpeningFit(int(n), rms, n_starts))


def opening_candidates(t: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray, m_steps: np.ndarray,
                       r_km: np.ndarray, prm: np.ndarray, sigma_vec_nT: float, *,
                       windows_s: tuple[float, ...] = (60.0, 120.0, 240.0), n_starts: int = 12,
                       max_candidates: int = 4, floor_att_rad: float = 5.0 * RAD_PER_DEG,
                       floor_rate_rad_s: float = 0.05 * RAD_PER_DEG) -> list[InitialState]:
    """Attitude and body rate at t[0] from the magnetometer alone: the distinct minima over each window.

    ``n_starts`` guesses spread about the field axis are refined by least squares on (attitude, rate)
    with Euler's equations over the first window; the distinct minima (at most ``max_candidates``)
    are kept and refined over the next window, and so on. Shorter windows suffer less from the
    model's error, longer ones see more of the field's turn in GCRF, so every window's minima are
    returned (best first within a window). P0 floors ``floor_att_rad``, ``floor_rate_rad_s``: common
    practice, no source.
    """
    w_guess, a_guess = _first_guess(t, b_body_nT, b_ref_nT, sigma_vec_nT)
    grid, mw = _coarse_grid(t, m_steps, max(windows_s))
    tw, bw, rw, rkm = t[grid], b_body_nT[grid], b_ref_nT[grid], r_km[grid]

    def residuals(p, a_start, n):
        # attitude as a small body-axis error about a_start: A = (I - [p x]) A_start, the filter's convention
        q0 = (Rotation.from_rotvec(-p[:3]) * a_start).as_quat()
        qs, _ = propagate_rigid_body(q0, p[3:].copy(), tw[:n], mw[:n], rw[:n], rkm[:n], prm, 1)
        return ((Rotation.from_quat(qs).apply(rw[:n]) - bw[:n]) / sigma_vec_nT).ravel()

    axis = b_body_nT[0] / np.linalg.norm(b_body_nT[0])
    xs = np.r_[np.full(3, 0.1), np.full(3, 0.01)]
    starts = [(0.0, Rotation.from_rotvec(axis * 2.0 * np.pi * j / n_starts) * a_guess, w_guess, None)
              for j in range(n_starts)]
    out = []
    for window in sorted(windows_s):
        n = max(int(np.searchsorted(tw, t[0] + window, side="right")), 8)
        found = []
        for _, start, w0, _ in starts:
            fit = least_squares(residuals, np.r_[np.zeros(3), w0], args=(start, n), method="lm", x_scale=xs)
            found.append((fit.cost, Rotation.from_rotvec(-fit.x[:3]) * start, fit.x[3:], fit))
        starts = _distinct(found, max_candidates)
        out += [_candidate(cost, att, fit, n, float(tw[n - 1] - t[0]), n_starts, sigma_vec_nT, floor_att_rad,
                           floor_rate_rad_s) for cost, att, _, fit in starts]
    return out


def distinct_openings(found: list[InitialState]) -> list[InitialState]:
    """The openings whose attitudes differ by more than DISTINCT_DEG from every one before them
    (the order is kept: best first within each window)."""
    kept = []
    for c in found:
        r = Rotation.from_quat(c.q_body_from_gcrf)
        if all(np.rad2deg((r * Rotation.from_quat(k.q_body_from_gcrf).inv()).magnitude()) > DISTINCT_DEG for k in kept):
            kept.append(c)
    return kept


def carry_back_with_dynamics(init: InitialState, t: np.ndarray, k0: int, m_steps: np.ndarray, b_ref: np.ndarray,
                             r_km: np.ndarray, prm: np.ndarray) -> InitialState:
    """An opening (attitude, body rate) solved at ``t[k0]``, moved back to ``t[0]`` with Euler's equations.

    RK4 runs backwards over the rows (two sub-steps per interval) under the dipole and the gravity
    gradient. Over the gap ``g`` the attitude sigma grows, the same about every axis, to
    ``sqrt(max sigma_att^2 + (max sigma_w g)^2 + s_w^2 g^3 / 3)`` and the rate sigma to
    ``sqrt(sigma_w^2 + s_w^2 g)``, with ``s_w`` the white unmodelled torque over the smallest principal
    inertia.

    Parameters
    ----------
    init : InitialState at t[k0] (v is the body rate, rad/s)
    t : (K,) s; k0 : int; m_steps : (K, 3) A m^2 held over each interval; b_ref : (K, 3) nT GCRF (finite);
    r_km : (K, 3) km GCRF; prm : filter parameters (inertia, torque noise)

    Returns
    -------
    InitialState at t[0] (``carried_back_s`` = the gap)
    """
    gap = float(t[k0] - t[0])
    if k0 <= 0 or gap <= 0.0:
        return dataclasses.replace(init, carried_back_s=0.0)
    idx = np.arange(k0, -1, -1)
    m_back = np.empty((len(idx), 3))
    m_back[:-1] = m_steps[idx[1:]]  # backward interval [t_j+1, t_j] holds the dipole of interval j
    m_back[-1] = m_steps[0]
    qs, ws = propagate_rigid_body(np.asarray(init.q_body_from_gcrf, float), np.asarray(init.v, float),
                                  t[idx], m_back, b_ref[idx], r_km[idx], prm, 2)
    j_min = float(np.linalg.eigvalsh(prm[P_J:P_J + 9].reshape(3, 3)).min())
    s_w = prm[P_SIGTAU] / j_min
    s_att = np.sqrt(np.max(init.sigma_att_rad ** 2) + (np.max(init.sigma_v) * gap) ** 2 + s_w ** 2 * gap ** 3 / 3.0)
    s_rate = np.sqrt(init.sigma_v ** 2 + s_w ** 2 * gap)
    q = qs[-1]
    return dataclasses.replace(init, q_body_from_gcrf=q if q[3] >= 0 else -q, v=ws[-1].copy(),
                               sigma_att_rad=np.full(3, s_att), sigma_v=s_rate, carried_back_s=gap)


def gyro_seeded_start(t: np.ndarray, inputs: PassInputs, check: GyroCheck | None, noise: NoiseModel,
                      sigma_vec_nT: float, init_window_s: float) -> InitialState | None:
    """The opening from the gyro while it was alive, when it died only later in the pass; else None.

    It needs a live stretch longer than the opening window plus 60 s that starts with the pass (within
    1 s). The opening body rate is the mean gyro rate of the first second less the solved bias.
    """
    t_epoch = inputs.t_mag_ns[0]
    t_gyro_s = (inputs.t_gyro_ns - t_epoch) / NS_PER_S
    w_gyro = inputs.w_gyro_body_rad_s
    dead0 = check.dead_start_s if check is not None and check.dead_start_s is not None else None
    if dead0 is None or not (dead0 - t_gyro_s[0] > init_window_s + 60.0 and t_gyro_s[0] <= t[0] + 1.0):
        return None
    alive = t_gyro_s < dead0
    okm = inputs.usable & (t < dead0)
    gi = initial_state_with_gyro(t[okm], inputs.b_body_nT[okm], inputs.b_ref_gcrf_nT[okm], t_gyro_s[alive],
                                 w_gyro[alive], sigma_vec_nT=sigma_vec_nT, sigma_bias0_rad_s=noise.gyro_bias0_rad_s,
                                 window_s=init_window_s, max_window_s=min(600.0, dead0 - t_gyro_s[0]))
    w0 = w_gyro[alive][t_gyro_s[alive] <= t[0] + 1.0].mean(axis=0) - gi.v
    s_w = np.sqrt(gi.sigma_v ** 2 + (noise.gyro_arw_rad_sqrt_s or 1e-3) ** 2 + (0.01 * RAD_PER_DEG) ** 2)
    return InitialState(gi.q_body_from_gcrf, w0, gi.sigma_att_rad, s_w, "gyro-seeded (gyro alive before it died)",
                        gi.window_s, gi.fit)
