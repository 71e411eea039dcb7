"""The reconstruction without a gyro (gyro absent or dead): dynamics mode.

Attitude and body rate are propagated with Euler's equations under the logged coil dipole and the
gravity-gradient torque, corrected by the magnetometer only, as in Psiaki, Martel & Pal (1990). The
opening state comes from the magnetometer alone (several starts about the field direction, refined by
least squares over the opening window), or from the gyro while it was still alive when it died only
later in the pass; it is carried back to the filter's first step with Euler's equations.

References
----------
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics and Euler's equations), 3.3.6.3 (gravity gradient).
Savitzky, A. and Golay, M. J. E. (1964). Smoothing and differentiation of data by simplified least
squares procedures. Anal. Chem. 36(8), 1627-1639 (the local-slope derivative) (memory).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

import numpy as np
from numba import njit
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from ..core import NS_PER_S, RAD_PER_DEG, cross_matrices, local_slope, mean_dipole_over_steps
from .gyro_check import GyroCheck
from .initial import InitialState, davenport_q_method, initial_state_with_gyro
from .kernels import MODE_DYNAMICS, P_J, P_SIGTAU, rk4_rigid_body
from .noise import resolve_noise
from .run import extract_track, filter_params, run_filter
from .types import AttitudeHistory, FilterStart, NoiseModel, OpeningFit, PassInputs

__all__ = ["carry_back_with_dynamics", "estimate_dynamics", "initial_state_dynamics", "propagate_rigid_body"]


def _dyn_inputs(t: np.ndarray, m_steps: np.ndarray, r_km: np.ndarray) -> np.ndarray:
    """Per-step inputs of dynamics mode (K, 9): the mean coil dipole over the step (A m^2, body) and the
    position at both ends of it (km, GCRF; the last step repeats its own)."""
    u = np.zeros((len(t), 9))
    u[:, 0:3] = m_steps
    u[:, 3:6] = r_km
    u[:-1, 6:9] = r_km[1:]
    u[-1, 6:9] = r_km[-1]
    return u


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


def initial_state_dynamics(t: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray, m_steps: np.ndarray,
                           r_km: np.ndarray, prm: np.ndarray, sigma_vec_nT: float, *,
                           window_s: float = 120.0, n_starts: int = 12,
                           floor_att_rad: float = 5.0 * RAD_PER_DEG, floor_rate_rad_s: float = 0.05 * RAD_PER_DEG
                           ) -> InitialState:
    """Attitude and body rate at t[0] from the magnetometer alone (no gyro).

    1. Rate guess: least squares of ``db/dt = [b x] w`` over the first 6 s (the field's own turning,
       about twice the orbital rate, is neglected here).
    2. Attitude guess: q-method on the samples of the first 10 s carried back with that rate.
    3. Because one field direction leaves the rotation about it undetermined until the field turns
       in GCRF, ``n_starts`` guesses spread about the field axis are each refined by least squares
       on (attitude, rate) with Euler's equations over ``window_s``; the smallest residual wins.

    The covariance of the winner, scaled by the number of vectors (correlated field-model error),
    floored at ``floor_att_rad`` and ``floor_rate_rad_s`` (common practice, no source), gives P0.
    """
    t0 = t[0]
    first = np.nonzero(t - t0 <= 6.0)[0]
    bdot = local_slope(t[first], b_body_nT[first], 1.0)
    ok = np.all(np.isfinite(bdot), axis=1)
    b = b_body_nT[first][ok]
    bx = cross_matrices(b)
    w_guess, *_ = np.linalg.lstsq(bx.reshape(-1, 3), bdot[ok].ravel(), rcond=None)
    sel10 = np.nonzero(t - t0 <= 10.0)[0]
    dq = Rotation.from_rotvec(-np.outer(t[sel10] - t0, w_guess))
    sol = davenport_q_method(dq.inv().apply(b_body_nT[sel10]), b_ref_nT[sel10], sigma_vec_nT / 3e4)
    a_guess = Rotation.from_quat(sol.q_body_from_gcrf)
    # a coarse grid (0.5 s) for the least squares: RK4 at 0.5 s is exact to ~(w dt)^5 at these rates
    win = np.nonzero(t - t0 <= window_s)[0]
    step = max(1, int(round(0.5 / max(float(np.median(np.diff(t[win]))), 1e-3))))
    grid = win[::step]
    tw, bw, rw_, rkm = t[grid], b_body_nT[grid], b_ref_nT[grid], r_km[grid]
    dtf = np.diff(t[win[0]:grid[-1] + 1])
    mw = np.zeros((len(grid), 3))
    for j in range(len(grid) - 1):  # mean dipole over each coarse interval
        a, b = grid[j] - win[0], grid[j + 1] - win[0]
        mw[j] = (m_steps[win[0] + a:win[0] + b] * dtf[a:b, None]).sum(0) / dtf[a:b].sum()
    mw[-1] = mw[-2] if len(grid) > 1 else 0.0

    def residuals(p, a_start, n=None):
        # attitude as a small body-axis error about a_start: A = (I - [p x]) A_start, the filter's convention
        n = len(grid) if n is None else n
        q0 = (Rotation.from_rotvec(-p[:3]) * a_start).as_quat()
        qs, _ = propagate_rigid_body(q0, p[3:].copy(), tw[:n], mw[:n], rw_[:n], rkm[:n], prm, 1)
        pred = Rotation.from_quat(qs).apply(rw_[:n])
        return ((pred - bw[:n]) / sigma_vec_nT).ravel()

    axis = b_body_nT[0] / np.linalg.norm(b_body_nT[0])
    # every start on the first half of the window, then the best two on all of it
    half = max(int(np.searchsorted(tw, t0 + window_s / 2)), 8)
    xs = np.r_[np.full(3, 0.1), np.full(3, 0.01)]
    fits = []
    for j in range(n_starts):
        start = Rotation.from_rotvec(axis * 2.0 * np.pi * j / n_starts) * a_guess
        fit = least_squares(residuals, np.r_[np.zeros(3), w_guess], args=(start, half), method="lm", x_scale=xs)
        fits.append((fit.cost, Rotation.from_rotvec(-fit.x[:3]) * start, fit.x[3:]))
    fits.sort(key=lambda f: f[0])
    best = None
    for _, start, w0 in fits[:2]:
        fit = least_squares(residuals, np.r_[np.zeros(3), w0], args=(start,), method="lm", x_scale=xs)
        if best is None or fit.cost < best[0].cost:
            best = (fit, start)
    best, a_best = best
    sub = grid
    try:
        cov = np.linalg.inv(best.jac.T @ best.jac) * len(sub)
    except np.linalg.LinAlgError:
        cov = np.diag(np.r_[np.full(3, np.pi ** 2), np.full(3, (1.0 * RAD_PER_DEG) ** 2)])
    q0 = (Rotation.from_rotvec(-best.x[:3]) * a_best).as_quat()
    d = np.nan_to_num(np.sqrt(np.clip(np.diag(cov), 0.0, None)), nan=np.pi, posinf=np.pi)
    s_att = np.maximum(d[:3], floor_att_rad)
    s_w = np.maximum(d[3:], floor_rate_rad_s)
    rms = float(np.sqrt(np.mean(best.fun ** 2)) * sigma_vec_nT)
    return InitialState(q0 if q0[3] >= 0 else -q0, best.x[3:].copy(), s_att, s_w, "multi-start-dynamics-lsq",
                        float(tw[-1] - t0), OpeningFit(int(len(sub)), rms, n_starts))


def carry_back_with_dynamics(init: InitialState, t: np.ndarray, k0: int, m_steps: np.ndarray, b_ref: np.ndarray,
                             r_km: np.ndarray, prm: np.ndarray) -> InitialState:
    """An opening (attitude, body rate) solved at ``t[k0]``, moved back to ``t[0]`` with Euler's equations.

    RK4 runs backwards over the rows (two sub-steps per interval) under the logged dipole and the
    gravity gradient. Over the gap ``g`` the attitude sigma grows, the same about every axis, to
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


def _fill_rows(t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Copy of x (N, 3) with non-finite rows linearly interpolated in t (held beyond the ends)."""
    good = np.all(np.isfinite(x), axis=1)
    if good.all() or not good.any():
        return x.copy()
    out = x.copy()
    for ax in range(x.shape[1]):
        out[~good, ax] = np.interp(t[~good], t[good], x[good, ax])
    return out


def _gyro_seeded_start(t: np.ndarray, inputs: PassInputs, check: GyroCheck | None, noise: NoiseModel,
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


def _torque_inputs(t: np.ndarray, t_epoch_ns: int, coil_t_utc, i_coil_A, dipole_per_amp,
                   r_gcrf_km: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Mean coil dipole over each step (A m^2, body; zero without coils) and the position at each row
    (km, GCRF; zero without one, missing rows interpolated)."""
    ct = None if coil_t_utc is None else (np.asarray(coil_t_utc).astype("datetime64[ns]").astype(np.int64)
                                          - t_epoch_ns) / NS_PER_S
    m_steps = mean_dipole_over_steps(t, ct, i_coil_A, dipole_per_amp)
    r_km = np.zeros((len(t), 3)) if r_gcrf_km is None else np.nan_to_num(_fill_rows(t, np.asarray(r_gcrf_km, float)))
    return m_steps, r_km


def estimate_dynamics(inputs: PassInputs, noise: NoiseModel, inertia: np.ndarray, coil_t_utc: np.ndarray | None,
                      i_coil_A: np.ndarray | None, dipole_per_amp: np.ndarray | None, r_gcrf_km: np.ndarray | None,
                      init_window_s: float, report: Callable[[str, float], None],
                      check: GyroCheck | None = None) -> AttitudeHistory:
    """Dynamics-mode reconstruction on the magnetometer time stamps.

    When a gyro log exists whose early part is alive (dead only later in the pass, ``check``), that
    part seeds the initial attitude and rate; otherwise the start is found from the magnetometer alone.
    Parameters as in :func:`recon.estimate.estimate_attitude` (inertia in kg m^2).
    """
    t_mag_ns, usable = inputs.t_mag_ns, inputs.usable
    b_body, b_ref = inputs.b_body_nT, inputs.b_ref_gcrf_nT
    t = (t_mag_ns - t_mag_ns[0]) / NS_PER_S
    noise, source = resolve_noise(noise, b_body[usable], None, None)
    prm = filter_params(noise, 0.0, inertia)
    # rows without a reference (no orbit position) are not used for updates; for the torque in the
    # propagation their field and position are interpolated from the neighbouring rows
    r = _fill_rows(t, b_ref)
    m_steps, r_km = _torque_inputs(t, t_mag_ns[0], coil_t_utc, i_coil_A, dipole_per_amp, r_gcrf_km)
    sig_vec = float(np.hypot(noise.mag_nT, noise.field_model_nT / np.sqrt(3.0)))
    report("initialisation", 0.05)
    init = None
    if inputs.t_gyro_ns is not None:
        init = _gyro_seeded_start(t, inputs, check, noise, sig_vec, init_window_s)
    if init is None:
        init = initial_state_dynamics(t[usable], b_body[usable], b_ref[usable], m_steps[usable], r_km[usable],
                                      prm, sig_vec, window_s=init_window_s)
    # both starts are solved at the first usable row; the filter starts at t[0]
    init = carry_back_with_dynamics(init, t, int(np.argmax(usable)), m_steps, r, r_km, prm)
    report("forward filter and smoother", 0.2)
    out_idx = np.arange(len(t), dtype=np.int64)
    run = run_filter(MODE_DYNAMICS, t, _dyn_inputs(t, m_steps, r_km), usable.copy(), np.nan_to_num(b_body), r, prm,
                     init, out_idx, len(t))
    sel = np.arange(len(t))
    start = FilterStart(init.method, init.window_s, np.rad2deg(init.sigma_att_rad).tolist(), run.smoother_bad,
                        init.fit, init.carried_back_s, rate0_dps=np.rad2deg(init.v).tolist())
    return AttitudeHistory(t_mag_ns.astype("datetime64[ns]"), extract_track(run, True, sel, MODE_DYNAMICS, None, 0.0),
                           extract_track(run, False, sel, MODE_DYNAMICS, None, 0.0), run.nis[usable],
                           t_mag_ns[usable].astype("datetime64[ns]"), "dynamics", "", (), noise, source, start)
