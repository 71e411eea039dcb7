"""Rigid-body attitude dynamics of the simulated satellite.

State: ``q_body_from_gcrf`` (scalar-last, recon's convention, see :mod:`recon.frames`) and the body
rate ``w_body_rad_s`` of the body relative to GCRF, in body axes. Equations:

- kinematics: the attitude matrix A = A(q) obeys dA/dt = -[w x] A, i.e. with Hamilton products in
  scalar-last storage ``dq/dt = -1/2 (w, 0) (x) q``;
- Euler's equations with the full inertia tensor: ``J dw/dt = tau - w x (J w)``;
- torques: magnetic ``m x B`` (A m^2 x T = N m), gravity gradient ``3 mu / |r|^5 (r_b x J r_b)``
  and an external torque given per segment (the random disturbance).

The dipole and the disturbance are held constant on segments between event times; each segment is
crossed with classical fourth-order Runge-Kutta steps no longer than ``max_step_s`` and the quaternion
is renormalised after each step. Field and position come from a cubic Hermite interpolation of
GCRF grid values (tesla, metres).

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Ch. 3 (quaternion kinematics, Euler's equations, gravity-gradient torque).
Griffiths, D. J. (2017). Introduction to Electrodynamics, 4th ed., sec. 6.1 (torque on a magnetic
dipole, N = m x B).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..core import MU_EARTH_m3_s2

__all__ = ["magnetic_torque_Nm", "gravity_gradient_torque_Nm", "kinetic_energy_J",
           "inertial_momentum_Nms", "propagate", "hermite_many"]


# ------------------------------------------------------------------------------ numpy reference forms
def magnetic_torque_Nm(m_body_Am2: np.ndarray, b_body_nT: np.ndarray) -> np.ndarray:
    """Torque on a magnetic dipole, ``tau = m x B`` (Griffiths 2017, eq. 6.1).

    Parameters
    ----------
    m_body_Am2 : (..., 3) array, A m^2, body frame
    b_body_nT : (..., 3) array, nT, body frame

    Returns
    -------
    (..., 3) array, N m, body frame
    """
    return np.cross(m_body_Am2, np.asarray(b_body_nT, dtype=float) * 1e-9)


def gravity_gradient_torque_Nm(r_body_km: np.ndarray, inertia_kg_m2: np.ndarray) -> np.ndarray:
    """Gravity-gradient torque ``3 mu / |r|^5 (r x J r)`` with r the position in body axes.

    Parameters
    ----------
    r_body_km : (..., 3) array, km, satellite position from the Earth's centre in body axes
    inertia_kg_m2 : (3, 3) array

    Returns
    -------
    (..., 3) array, N m, body frame
    """
    r = np.asarray(r_body_km, dtype=float) * 1e3
    jr = r @ np.asarray(inertia_kg_m2).T
    rn = np.linalg.norm(r, axis=-1, keepdims=True)
    return 3.0 * MU_EARTH_m3_s2 / rn ** 5 * np.cross(r, jr)


def kinetic_energy_J(w_body_rad_s: np.ndarray, inertia_kg_m2: np.ndarray) -> np.ndarray:
    """Rotational kinetic energy ``w . J w / 2``, J, for (..., 3) rates."""
    w = np.asarray(w_body_rad_s, dtype=float)
    return 0.5 * np.einsum("...i,ij,...j->...", w, inertia_kg_m2, w)


def inertial_momentum_Nms(q_body_from_gcrf: np.ndarray, w_body_rad_s: np.ndarray,
                          inertia_kg_m2: np.ndarray) -> np.ndarray:
    """Angular momentum in GCRF, ``A(q)^T J w``, N m s, (N, 3)."""
    from ..core import rotation_from_q

    h_body = np.asarray(w_body_rad_s, dtype=float) @ np.asarray(inertia_kg_m2).T
    return rotation_from_q(q_body_from_gcrf).inv().apply(h_body)


# ---------------------------------------------------------------------------------- compiled core
@njit(cache=True)
def _hermite(t, t0, h, Y, D, out):
    n = Y.shape[0]
    x = (t - t0) / h
    i = int(np.floor(x))
    if i < 0:
        i = 0
    elif i > n - 2:
        i = n - 2
    s = x - i
    s2 = s * s
    s3 = s2 * s
    h00 = 2.0 * s3 - 3.0 * s2 + 1.0
    h10 = s3 - 2.0 * s2 + s
    h01 = -2.0 * s3 + 3.0 * s2
    h11 = s3 - s2
    for k in range(Y.shape[1]):
        out[k] = h00 * Y[i, k] + h10 * h * D[i, k] + h01 * Y[i + 1, k] + h11 * h * D[i + 1, k]


@njit(cache=True)
def hermite_many(t, t0, h, Y, D):
    """Cubic Hermite interpolation of node values Y and derivatives D (uniform grid t0 + h k)."""
    out = np.empty((t.shape[0], Y.shape[1]))
    for j in range(t.shape[0]):
        _hermite(t[j], t0, h, Y, D, out[j])
    return out


@njit(cache=True)
def _rotate(q, v, out):
    """out = A(q) v for scalar-last q (active rotation q v q*)."""
    x, y, z, w = q[0], q[1], q[2], q[3]
    cx = y * v[2] - z * v[1]
    cy = z * v[0] - x * v[2]
    cz = x * v[1] - y * v[0]
    out[0] = v[0] + 2.0 * (w * cx + y * cz - z * cy)
    out[1] = v[1] + 2.0 * (w * cy + z * cx - x * cz)
    out[2] = v[2] + 2.0 * (w * cz + x * cy - y * cx)


@njit(cache=True)
def _deriv(t, s, m, tau, J, Jinv, gg, t0, h, Y, D, env, bb, rb, ds):
    q = s[0:4]
    w = s[4:7]
    _hermite(t, t0, h, Y, D, env)
    _rotate(q, env[0:3], bb)
    tx = m[1] * bb[2] - m[2] * bb[1] + tau[0]
    ty = m[2] * bb[0] - m[0] * bb[2] + tau[1]
    tz = m[0] * bb[1] - m[1] * bb[0] + tau[2]
    if gg:
        _rotate(q, env[3:6], rb)
        rn2 = rb[0] * rb[0] + rb[1] * rb[1] + rb[2] * rb[2]
        c = 3.0 * MU_EARTH_m3_s2 / (rn2 * rn2 * np.sqrt(rn2))
        jx = J[0, 0] * rb[0] + J[0, 1] * rb[1] + J[0, 2] * rb[2]
        jy = J[1, 0] * rb[0] + J[1, 1] * rb[1] + J[1, 2] * rb[2]
        jz = J[2, 0] * rb[0] + J[2, 1] * rb[1] + J[2, 2] * rb[2]
        tx += c * (rb[1] * jz - rb[2] * jy)
        ty += c * (rb[2] * jx - rb[0] * jz)
        tz += c * (rb[0] * jy - rb[1] * jx)
    hx = J[0, 0] * w[0] + J[0, 1] * w[1] + J[0, 2] * w[2]
    hy = J[1, 0] * w[0] + J[1, 1] * w[1] + J[1, 2] * w[2]
    hz = J[2, 0] * w[0] + J[2, 1] * w[1] + J[2, 2] * w[2]
    ex = tx - (w[1] * hz - w[2] * hy)
    ey = ty - (w[2] * hx - w[0] * hz)
    ez = tz - (w[0] * hy - w[1] * hx)
    ds[4] = Jinv[0, 0] * ex + Jinv[0, 1] * ey + Jinv[0, 2] * ez
    ds[5] = Jinv[1, 0] * ex + Jinv[1, 1] * ey + Jinv[1, 2] * ez
    ds[6] = Jinv[2, 0] * ex + Jinv[2, 1] * ey + Jinv[2, 2] * ez
    # dq/dt = -1/2 (w, 0) (x) q, Hamilton product, scalar last
    x, y, z, qw = q[0], q[1], q[2], q[3]
    ds[0] = -0.5 * (qw * w[0] + w[1] * z - w[2] * y)
    ds[1] = -0.5 * (qw * w[1] + w[2] * x - w[0] * z)
    ds[2] = -0.5 * (qw * w[2] + w[0] * y - w[1] * x)
    ds[3] = 0.5 * (w[0] * x + w[1] * y + w[2] * z)


@njit(cache=True)
def _propagate(s0, t_events, m_seg, tau_seg, J, Jinv, gg, t0, h, Y, D, max_step):
    n = t_events.shape[0]
    out = np.empty((n, 7))
    s = s0.copy()
    out[0] = s
    env = np.empty(6)
    bb = np.empty(3)
    rb = np.empty(3)
    k1 = np.empty(7)
    k2 = np.empty(7)
    k3 = np.empty(7)
    k4 = np.empty(7)
    tmp = np.empty(7)
    for seg in range(n - 1):
        ta = t_events[seg]
        dt_seg = t_events[seg + 1] - ta
        nsub = int(np.ceil(dt_seg / max_step - 1e-9))
        if nsub < 1:
            nsub = 1
        dt = dt_seg / nsub
        m = m_seg[seg]
        tau = tau_seg[seg]
        for k in range(nsub):
            t = ta + k * dt
            _deriv(t, s, m, tau, J, Jinv, gg, t0, h, Y, D, env, bb, rb, k1)
            for i in range(7):
                tmp[i] = s[i] + 0.5 * dt * k1[i]
            _deriv(t + 0.5 * dt, tmp, m, tau, J, Jinv, gg, t0, h, Y, D, env, bb, rb, k2)
            for i in range(7):
                tmp[i] = s[i] + 0.5 * dt * k2[i]
            _deriv(t + 0.5 * dt, tmp, m, tau, J, Jinv, gg, t0, h, Y, D, env, bb, rb, k3)
            for i in range(7):
                tmp[i] = s[i] + dt * k3[i]
            _deriv(t + dt, tmp, m, tau, J, Jinv, gg, t0, h, Y, D, env, bb, rb, k4)
            for i in range(7):
                s[i] += dt / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i])
            qn = np.sqrt(s[0] * s[0] + s[1] * s[1] + s[2] * s[2] + s[3] * s[3])
            for i in range(4):
                s[i] /= qn
        out[seg + 1] = s
    return out


def propagate(q0_body_from_gcrf: np.ndarray, w0_body_rad_s: np.ndarray, inertia_kg_m2: np.ndarray,
              t_events_s: np.ndarray, m_seg_body_Am2: np.ndarray | None = None,
              tau_seg_body_Nm: np.ndarray | None = None, env=None, gravity_gradient: bool = False,
              max_step_s: float = 0.02) -> tuple[np.ndarray, np.ndarray]:
    """Integrate attitude and rate through a list of event times.

    Parameters
    ----------
    q0_body_from_gcrf : (4,) scalar-last quaternion at ``t_events_s[0]``
    w0_body_rad_s : (3,) rad/s, body frame
    inertia_kg_m2 : (3, 3)
    t_events_s : (N,) increasing times, s since the pass epoch; the state is returned at each
    m_seg_body_Am2 : (N-1, 3) dipole held on each segment, A m^2, body frame (zero if None)
    tau_seg_body_Nm : (N-1, 3) other external torque on each segment, N m, body frame (zero if None)
    env : Environment or None
        Field and position for the magnetic and gravity-gradient torques; without it the field is
        zero and gravity gradient is off.
    gravity_gradient : bool
    max_step_s : float
        Longest Runge-Kutta step. 0.02 s keeps the local error of RK4 at a few deg/s far below
        the rounding of double precision.

    Returns
    -------
    q_body_from_gcrf : (N, 4), w_body_rad_s : (N, 3)
    """
    t = np.ascontiguousarray(t_events_s, dtype=float)
    n = t.shape[0]
    m = np.zeros((max(n - 1, 0), 3)) if m_seg_body_Am2 is None else np.ascontiguousarray(m_seg_body_Am2, float)
    tau = np.zeros_like(m) if tau_seg_body_Nm is None else np.ascontiguousarray(tau_seg_body_Nm, float)
    J = np.ascontiguousarray(inertia_kg_m2, dtype=float)
    if env is None:
        t0, h, Y, D, gg = 0.0, 1.0, np.zeros((2, 6)), np.zeros((2, 6)), False
        Y[:, 3] = 7.0e6  # a position to keep the (disabled) gravity-gradient term finite
    else:
        t0, h, Y, D, gg = float(env.t_s[0]), env.step_s, env.hermite_y, env.hermite_dy, gravity_gradient
    s0 = np.concatenate([np.asarray(q0_body_from_gcrf, float), np.asarray(w0_body_rad_s, float)])
    s0[:4] /= np.linalg.norm(s0[:4])
    out = _propagate(s0, t, m, tau, J, np.linalg.inv(J), gg, t0, h, Y, D, float(max_step_s))
    return out[:, :4], out[:, 4:]
