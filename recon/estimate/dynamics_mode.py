"""When the gyro cannot be trusted, and the filter that does without it.

Gyro checks use the kinematics of the measured field: in body axes ``db/dt = -(w x b) + A db_ref/dt``,
so with a gyro reading ``w_g = w + beta`` the residual ``db/dt + w_g x b - A db_ref/dt = beta x b``
must be explained by a small, nearly constant bias. A gyro stuck at one value, or at zero, or whose
output does not follow the field's motion is declared dead (anomaly ``gyro_dead``) and the pass is
reconstructed in dynamics mode: attitude and body rate propagated with Euler's equations under the
logged coil dipole and the gravity-gradient torque, corrected by the magnetometer only, as in Psiaki,
Martel & Pal (1990). A step in the bias of a live gyro is found in :mod:`recon._bias_step`.

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

from dataclasses import dataclass

import numpy as np
from numba import njit
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from ..core import (
    NS_PER_S,
    RAD_PER_DEG,
    Anomaly,
    local_slope,
    mean_dipole_over_steps,
    white_noise_from_differences,
    window_mean,
)
from . import kernels as core
from .initial import InitialState, davenport_q_method, initial_state_with_gyro

__all__ = ["GyroCheck", "check_gyro", "carry_back_with_dynamics", "estimate_dynamics", "initial_state_dynamics",
           "propagate_rigid_body"]



def _at(t_epoch_ns: int, t_s: float) -> np.datetime64:
    return np.datetime64(int(t_epoch_ns + round(t_s * NS_PER_S)), "ns")


def _longest_constant_run(t: np.ndarray, x: np.ndarray) -> tuple[float, float, int]:
    """Longest time span over which column values do not change: (start_s, stop_s, axis)."""
    best = (0.0, 0.0, -1)
    for ax in range(x.shape[1]):
        same = np.diff(x[:, ax]) == 0.0
        if not same.any():
            continue
        edges = np.diff(np.r_[0, same.astype(np.int8), 0])
        starts = np.nonzero(edges == 1)[0]
        stops = np.nonzero(edges == -1)[0]  # run covers samples starts..stops (inclusive)
        span = t[stops] - t[starts]
        k = int(np.argmax(span))
        if span[k] > best[1] - best[0]:
            best = (float(t[starts[k]]), float(t[stops[k]]), ax)
    return best


@dataclass(frozen=True)
class GyroCheck:
    """Verdict on the gyro log.

    Attributes
    ----------
    usable : bool
    reason : str, one sentence with the numbers
    dead_start_s, dead_stop_s : float or None, window where the gyro is dead (s since the epoch)
    axis : int or None
    explained_fraction : float or None
        Fraction of the field's body-frame rate of change explained by the gyro (1 for a perfect
        gyro, about 0 for a dead one); None when the satellite barely turns.
    """

    usable: bool
    reason: str
    dead_start_s: float | None = None
    dead_stop_s: float | None = None
    axis: int | None = None
    explained_fraction: float | None = None

    def anomaly(self, t_epoch_ns: int, dynamics_used: bool = True) -> Anomaly:
        start = None if self.dead_start_s is None else _at(t_epoch_ns, self.dead_start_s)
        stop = None if self.dead_stop_s is None else _at(t_epoch_ns, self.dead_stop_s)
        what = (" Attitude reconstructed without the gyro (dynamics mode)." if dynamics_used else
                " The gyro was used anyway because gyro mode was requested: treat the attitude with caution.")
        return Anomaly("gyro_dead", "critical", self.reason + what, start, stop,
                       axis=None if self.axis is None else "xyz"[self.axis], value=self.explained_fraction)


def check_gyro(t_gyro: np.ndarray, w_gyro: np.ndarray, t_mag: np.ndarray, b_body_nT: np.ndarray,
               arw_rad_sqrt_s: float | None, *, stuck_min_s: float = 30.0, stuck_min_fraction: float = 0.1,
               window_s: float = 60.0, max_bias_rad_s: float = 2.0 * RAD_PER_DEG,
               min_explained: float = 0.5, noise_factor: float = 20.0) -> GyroCheck:
    """Is the gyro alive? Three tests, any one failing makes it dead.

    1. Stuck: one axis repeats exactly the same value for at least ``stuck_min_s`` and
       ``stuck_min_fraction`` of the log (a live gyro's noise never repeats that long).
    2. Kinematics: over ``window_s`` windows where the body field turns faster than the orbit alone
       can turn it (|db/dt| > 3 x 0.0025 rad/s x |b|, i.e. three times twice the orbital rate), the
       gyro, less a constant bias of at most ``max_bias_rad_s``, must explain at least
       ``min_explained`` of the variance of db/dt.
    3. Noise: the per-sample white noise exceeds ``noise_factor`` times the stated ARW (output is
       noise), tested only when test 2 has no informative window.

    Thresholds are engineering choices (common practice, no source) with wide margins: a healthy
    gyro explains more than 90 % of db/dt when the satellite turns faster than 0.5 deg/s.

    Parameters
    ----------
    t_gyro : (G,) s; w_gyro : (G, 3) rad/s body; t_mag : (N,) s; b_body_nT : (N, 3) nT body
    arw_rad_sqrt_s : float or None, stated angle random walk
    """
    span = float(t_gyro[-1] - t_gyro[0])
    s0, s1, ax = _longest_constant_run(t_gyro, w_gyro)
    if ax >= 0 and (s1 - s0) >= max(stuck_min_s, stuck_min_fraction * span):
        value = float(w_gyro[np.searchsorted(t_gyro, s0), ax])
        return GyroCheck(False, f"gyro axis {'xyz'[ax]} repeats the same output {np.rad2deg(value):.4g} deg/s "
                                f"for {s1 - s0:.0f} s ({100 * (s1 - s0) / span:.0f} % of the log): stuck or dead.",
                         s0, float(t_gyro[-1]) if s1 >= t_gyro[-1] - 1.0 else s1, ax, None)
    # kinematic test
    bdot = local_slope(t_mag, b_body_nT, 1.0)
    wg = window_mean(t_gyro, w_gyro, t_mag, 1.0)
    ok = np.all(np.isfinite(bdot), axis=1)
    bmag = np.linalg.norm(b_body_nT, axis=1)
    floor = 3.0 * 0.0025 * bmag  # three times the field's own turning rate in a polar LEO
    fast = ok & (np.linalg.norm(bdot, axis=1) > floor)
    explained = None
    if fast.sum() >= 50:
        e = bdot[fast] + np.cross(wg[fast], b_body_nT[fast])
        # e = beta x b = -[b x] beta: least squares for a constant bias
        bx = np.zeros((fast.sum(), 3, 3))
        b = b_body_nT[fast]
        bx[:, 0, 1], bx[:, 0, 2], bx[:, 1, 2] = -b[:, 2], b[:, 1], -b[:, 0]
        bx[:, 1, 0], bx[:, 2, 0], bx[:, 2, 1] = b[:, 2], -b[:, 1], b[:, 0]
        beta, *_ = np.linalg.lstsq(-bx.reshape(-1, 3), e.ravel(), rcond=None)
        res = e + np.einsum("nij,j->ni", bx, beta)
        explained = float(1.0 - np.sum(res ** 2) / np.sum(bdot[fast] ** 2))
        bad_bias = np.linalg.norm(beta) > max_bias_rad_s
        if explained < min_explained or bad_bias:
            tf = t_mag[fast]
            frac_res = np.linalg.norm(res, axis=1) / np.linalg.norm(bdot[fast], axis=1)
            badw = tf[frac_res > 0.7]
            start = float(badw[0]) if len(badw) else float(tf[0])
            stop = float(badw[-1]) if len(badw) else float(tf[-1])
            why = (f"a bias of {np.rad2deg(np.linalg.norm(beta)):.2f} deg/s would be needed" if bad_bias else
                   f"the gyro explains only {100 * max(explained, 0.0):.0f} % of the field's body-frame rate "
                   f"of change (expected > {100 * min_explained:.0f} %)")
            return GyroCheck(False, f"gyro output does not follow the measured field's motion: {why}, over "
                                    f"{fast.sum()} samples where the satellite turns.", start, stop, None,
                             explained)
        return GyroCheck(True, f"gyro consistent with the magnetometer: explains {100 * explained:.1f} % of "
                               f"the field's body-frame rate of change.", explained_fraction=explained)
    if arw_rad_sqrt_s:
        dt = float(np.median(np.diff(t_gyro)))
        white = white_noise_from_differences(w_gyro)
        expected = arw_rad_sqrt_s / np.sqrt(dt)
        if white > noise_factor * expected:
            return GyroCheck(False, f"gyro white noise {np.rad2deg(white):.3g} deg/s per sample is "
                                    f"{white / expected:.0f} times the stated angle random walk allows, and the "
                                    f"satellite turns too slowly to test the output against the field.",
                             float(t_gyro[0]), float(t_gyro[-1]))
    return GyroCheck(True, "gyro not stuck; the satellite turns too slowly for a kinematic test.")


def _dyn_inputs(t: np.ndarray, m_steps: np.ndarray, r_km: np.ndarray) -> np.ndarray:
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
            q, w = core.rk4_rigid_body(q, w, dt, m_body[k], b0, b1, r0, r1, prm)
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
    bx = np.zeros((len(b), 3, 3))
    bx[:, 0, 1], bx[:, 0, 2], bx[:, 1, 2] = -b[:, 2], b[:, 1], -b[:, 0]
    bx[:, 1, 0], bx[:, 2, 0], bx[:, 2, 1] = b[:, 2], -b[:, 1], b[:, 0]
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
                        float(tw[-1] - t0), {"vectors": int(len(sub)), "residual_rms_nT": rms,
                                             "starts": n_starts})


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
    InitialState at t[0] (``detail["carried_back_s"]`` = the gap)
    """
    gap = float(t[k0] - t[0])
    if k0 <= 0 or gap <= 0.0:
        return InitialState(init.q_body_from_gcrf, init.v, init.sigma_att_rad, init.sigma_v, init.method,
                            init.window_s, {**init.detail, "carried_back_s": 0.0})
    idx = np.arange(k0, -1, -1)
    m_back = np.empty((len(idx), 3))
    m_back[:-1] = m_steps[idx[1:]]  # backward interval [t_j+1, t_j] holds the dipole of interval j
    m_back[-1] = m_steps[0]
    qs, ws = propagate_rigid_body(np.asarray(init.q_body_from_gcrf, float), np.asarray(init.v, float),
                                  t[idx], m_back, b_ref[idx], r_km[idx], prm, 2)
    j_min = float(np.linalg.eigvalsh(prm[core.P_J:core.P_J + 9].reshape(3, 3)).min())
    s_w = prm[core.P_SIGTAU] / j_min
    s_att = np.sqrt(np.max(init.sigma_att_rad ** 2) + (np.max(init.sigma_v) * gap) ** 2 + s_w ** 2 * gap ** 3 / 3.0)
    s_rate = np.sqrt(init.sigma_v ** 2 + s_w ** 2 * gap)
    q = qs[-1]
    return InitialState(q if q[3] >= 0 else -q, ws[-1].copy(), np.full(3, s_att), s_rate, init.method,
                        init.window_s, {**init.detail, "carried_back_s": gap})


def _fill_rows(t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Copy of x (N, 3) with non-finite rows linearly interpolated in t (held beyond the ends)."""
    good = np.all(np.isfinite(x), axis=1)
    if good.all() or not good.any():
        return x.copy()
    out = x.copy()
    for ax in range(x.shape[1]):
        out[~good, ax] = np.interp(t[~good], t[good], x[good, ax])
    return out


def estimate_dynamics(tm, bb, br, ok_rows, noise, inertia, coil_t_utc, i_coil_A, dipole_per_amp, r_gcrf_km,
                      init_window_s, report, gyro=None):
    """Dynamics-mode reconstruction on the magnetometer time stamps; returns an AttitudeHistory.

    When a gyro log exists whose early part is alive (dead only later in the pass), that part seeds
    the initial attitude and rate; otherwise the start is found from the magnetometer alone.
    """
    from . import attitude as est  # one-way at run time: estimate owns the result types

    t_epoch = tm[0]
    t = (tm - t_epoch) / NS_PER_S
    noise, src = est._resolve_noise(noise, bb[ok_rows], None, None)
    prm = est._params(noise, 0.0, inertia)
    # rows without a reference (no orbit position) are not used for updates; for the torque in the
    # propagation their field and position are interpolated from the neighbouring rows
    r = _fill_rows(t, br)
    z = np.nan_to_num(bb)
    ct = None if coil_t_utc is None else (np.asarray(coil_t_utc).astype("datetime64[ns]").astype(np.int64)
                                          - t_epoch) / NS_PER_S
    m_steps = mean_dipole_over_steps(t, ct, i_coil_A, dipole_per_amp)
    r_km = np.zeros((len(t), 3)) if r_gcrf_km is None else np.nan_to_num(_fill_rows(t, np.asarray(r_gcrf_km, float)))
    u = _dyn_inputs(t, m_steps, r_km)
    sig_vec = float(np.hypot(noise.mag_nT, noise.field_model_nT / np.sqrt(3.0)))
    report("initialisation", 0.05)
    init = None
    if gyro is not None:
        tg, wg, check = gyro
        tgs = (tg - t_epoch) / NS_PER_S
        dead0 = check.dead_start_s if check is not None and check.dead_start_s is not None else None
        if dead0 is not None and dead0 - tgs[0] > init_window_s + 60.0 and tgs[0] <= t[0] + 1.0:
            alive = tgs < dead0
            okm = ok_rows & (t < dead0)
            gi = initial_state_with_gyro(t[okm], bb[okm], br[okm], tgs[alive], wg[alive], sigma_vec_nT=sig_vec,
                                         sigma_bias0_rad_s=noise.gyro_bias0_rad_s, window_s=init_window_s,
                                         max_window_s=min(600.0, dead0 - tgs[0]))
            w0 = wg[alive][tgs[alive] <= t[0] + 1.0].mean(axis=0) - gi.v
            s_w = np.sqrt(gi.sigma_v ** 2 + (noise.gyro_arw_rad_sqrt_s or 1e-3) ** 2 + (0.01 * RAD_PER_DEG) ** 2)
            init = InitialState(gi.q_body_from_gcrf, w0, gi.sigma_att_rad, s_w,
                                "gyro-seeded (gyro alive before it died)", gi.window_s, gi.detail)
    if init is None:
        init = initial_state_dynamics(t[ok_rows], bb[ok_rows], br[ok_rows], m_steps[ok_rows], r_km[ok_rows],
                                      prm, sig_vec, window_s=init_window_s)
    # both starts are solved at the first usable row; the filter starts at t[0]
    init = carry_back_with_dynamics(init, t, int(np.argmax(ok_rows)), m_steps, r, r_km, prm)
    report("forward filter and smoother", 0.2)
    out_idx = np.arange(len(t), dtype=np.int64)
    run = est.run_filter(core.MODE_DYNAMICS, t, u, ok_rows.copy(), z, r, prm, init, out_idx, len(t))
    sel = np.arange(len(t))
    sm = est._track(run, True, sel, core.MODE_DYNAMICS, prm, None, 0.0)
    fw = est._track(run, False, sel, core.MODE_DYNAMICS, prm, None, 0.0)
    return est.AttitudeHistory(tm.astype("datetime64[ns]"), sm, fw, run.nis[ok_rows],
                               tm[ok_rows].astype("datetime64[ns]"), "dynamics", "", (), noise, src,
                               {"method": init.method, "window_s": init.window_s,
                                "rate0_dps": np.rad2deg(init.v).tolist(),
                                "sigma_att0_deg": np.rad2deg(init.sigma_att_rad).tolist(),
                                "smoother_steps_not_pd": run.smoother_bad, **init.detail})
