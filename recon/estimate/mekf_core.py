"""Compiled inner loops of the attitude filter: propagation, vector update, forward pass, RTS smoother.

Plain float arrays in, plain float arrays out; every function is a pure function of its arguments
(the output arrays are filled in place and are the only thing written). Units: s, rad, rad/s, nT,
A m^2, N m, m^3/s^2; frames as in :mod:`recon.frames`.

Quaternions are scalar-last and follow scipy's convention (Hamilton product, ``A(q) v_gcrf =
v_body``); the kinematics is ``dA/dt = -[w x] A``, so one step with a constant body rate w is
``q(t + dt) = q(-w dt) (x) q(t)``, with ``q(v)`` the quaternion of rotation vector v.

Error state (the multiplicative EKF of Lefferts, Markley & Shuster 1982): ``dx = [dtheta, dv, db]``
with ``A_true = (I - [dtheta x]) A_est`` (the attitude error in body axes, as in Markley & Crassidis
2014 ch. 6), ``dv`` the error of the gyro bias (gyro mode) or of the body rate (dynamics mode),
and ``db`` the error of the estimated field-model error (GCRF, nT). The error state always has N = 9
components (constant loop bounds let the compiler unroll the small matrix products); a white
field-model error (``tau_f = 0``) is the same filter with ``exp(-dt/tau_f) = 0``, which is exactly the
six-state filter with ``sig_f^2`` added to the measurement noise.

- Gyro mode (Markley & Crassidis 2014 ch. 6): ``F = [[-[w x], -I], [0, 0]]``; the discrete Phi is
  the exact transition for a rate held over the step; the discrete Q is the one of Crassidis &
  Junkins 2012 ch. 7 (ARW ``sv``, rate random walk ``su``), plus the growth of attitude error while
  a gyro sample is held for longer than its nominal interval (a gap in the gyro log): held white
  noise ``sv^2 s^2 / h`` and an unknown, steady angular acceleration ``acc`` (the rate keeps changing
  while it is held) giving ``acc^2 s^4 / 4``.
- Dynamics mode (rate from Euler's equations, as in Psiaki, Martel & Pal 1990): attitude and body
  rate integrated with RK4 under magnetic torque ``m x B`` and gravity gradient ``3 mu/|r|^3 (n x J n)``;
  ``F = [[-[w x], I], [J^-1 (T_theta), J^-1 ([Jw x] - [w x] J)]]``; Phi to second order in dt with
  F averaged over the step's ends; Q from a white unmodelled torque.
- Field-model error: a first-order Gauss-Markov process per GCRF axis with time constant ``tau_f``
  and steady sigma ``sig_f`` (state augmentation for coloured measurement noise, Bryson & Henrikson
  1968); the measurement is ``z = A(q) (b_ref + db) + v``.

References
----------
Lefferts, E. J., Markley, F. L. and Shuster, M. D. (1982). Kalman filtering for spacecraft attitude
estimation. J. Guidance 5(5), 417-429.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Ch. 6.
Crassidis, J. L. and Junkins, J. L. (2012). Optimal Estimation of Dynamic Systems, 2nd ed. CRC.
Ch. 7 (gyro model and its discrete Q), ex. 5.1 (Rauch-Tung-Striebel smoother).
Rauch, H. E., Tung, F. and Striebel, C. T. (1965). Maximum likelihood estimates of linear dynamic
systems. AIAA J. 3(8), 1445-1450 (memory).
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Bryson, A. E. and Henrikson, L. J. (1968). Estimation using sampled data containing sequentially
correlated noise. J. Spacecraft and Rockets 5(6), 662-665 (memory).
"""

from __future__ import annotations

import numpy as np
from numba import njit

# Indices into the parameter vector ``prm`` (a plain float array; see estimate._params).
P_SV, P_SU, P_ACC, P_HNOM, P_TAUF, P_SIGF, P_SIGM, P_SIGTAU, P_MU = 0, 1, 2, 3, 4, 5, 6, 7, 8
P_J, P_JINV = 9, 18
P_TAUREL = 27
N_PRM = 28

MODE_GYRO, MODE_DYNAMICS = 0, 1
N = 9  # error-state size: attitude (3), gyro bias or body rate (3), field-model error (3)
NP = N * (N + 1) // 2  # stored covariances keep the upper triangle only, row by row (45 numbers)


# --------------------------------------------------------------------------------- small algebra
@njit(cache=True)
def qmul(p, q):
    """Hamilton product p (x) q, scalar-last (scipy: ``(P * Q).as_quat()``)."""
    out = np.empty(4)
    out[0] = p[3] * q[0] + q[3] * p[0] + p[1] * q[2] - p[2] * q[1]
    out[1] = p[3] * q[1] + q[3] * p[1] + p[2] * q[0] - p[0] * q[2]
    out[2] = p[3] * q[2] + q[3] * p[2] + p[0] * q[1] - p[1] * q[0]
    out[3] = p[3] * q[3] - p[0] * q[0] - p[1] * q[1] - p[2] * q[2]
    return out


@njit(cache=True)
def quat_from_rotvec(v0, v1, v2):
    """Quaternion of the rotation vector (v0, v1, v2) (scipy ``from_rotvec``)."""
    th = np.sqrt(v0 * v0 + v1 * v1 + v2 * v2)
    out = np.empty(4)
    if th < 1e-8:
        s = 0.5 - th * th / 48.0
    else:
        s = np.sin(0.5 * th) / th
    out[0] = s * v0
    out[1] = s * v1
    out[2] = s * v2
    out[3] = np.cos(0.5 * th)
    return out


@njit(cache=True)
def rotvec_from_quat(q):
    """Rotation vector of q (shortest rotation, sign of q irrelevant)."""
    x, y, z, w = q[0], q[1], q[2], q[3]
    if w < 0.0:
        x, y, z, w = -x, -y, -z, -w
    s = np.sqrt(x * x + y * y + z * z)
    out = np.empty(3)
    if s < 1e-12:
        f = 2.0 / w
    else:
        f = 2.0 * np.arctan2(s, w) / s
    out[0] = f * x
    out[1] = f * y
    out[2] = f * z
    return out


@njit(cache=True)
def qnormalize(q):
    n = np.sqrt(q[0] * q[0] + q[1] * q[1] + q[2] * q[2] + q[3] * q[3])
    return q / n


@njit(cache=True)
def _rot_step_into(v0, v1, v2, q, out):
    """out = normalised q(v) (x) q for the rotation vector v: one step of the kinematics, no allocation."""
    th = np.sqrt(v0 * v0 + v1 * v1 + v2 * v2)
    if th < 1e-8:
        sc = 0.5 - th * th / 48.0
    else:
        sc = np.sin(0.5 * th) / th
    px, py, pz, pw = sc * v0, sc * v1, sc * v2, np.cos(0.5 * th)
    x = pw * q[0] + q[3] * px + py * q[2] - pz * q[1]
    y = pw * q[1] + q[3] * py + pz * q[0] - px * q[2]
    z = pw * q[2] + q[3] * pz + px * q[1] - py * q[0]
    w = pw * q[3] - px * q[0] - py * q[1] - pz * q[2]
    nn = np.sqrt(x * x + y * y + z * z + w * w)
    out[0] = x / nn
    out[1] = y / nn
    out[2] = z / nn
    out[3] = w / nn


@njit(cache=True)
def _attitude_matrix_into(q, a):
    """Write A(q) into the (3, 3) array ``a`` (see :func:`attitude_matrix`)."""
    x, y, z, w = q[0], q[1], q[2], q[3]
    a[0, 0] = w * w + x * x - y * y - z * z
    a[0, 1] = 2.0 * (x * y - z * w)
    a[0, 2] = 2.0 * (x * z + y * w)
    a[1, 0] = 2.0 * (x * y + z * w)
    a[1, 1] = w * w - x * x + y * y - z * z
    a[1, 2] = 2.0 * (y * z - x * w)
    a[2, 0] = 2.0 * (x * z - y * w)
    a[2, 1] = 2.0 * (y * z + x * w)
    a[2, 2] = w * w - x * x - y * y + z * z


@njit(cache=True)
def attitude_matrix(q):
    """A(q) with ``A @ v_gcrf = v_body`` (scipy ``as_matrix``)."""
    a = np.empty((3, 3))
    _attitude_matrix_into(q, a)
    return a


@njit(cache=True)
def _skew_into(v, out, r0, c0, scale):
    """out[r0:r0+3, c0:c0+3] = scale * [v x]."""
    out[r0 + 0, c0 + 0] = 0.0
    out[r0 + 0, c0 + 1] = -scale * v[2]
    out[r0 + 0, c0 + 2] = scale * v[1]
    out[r0 + 1, c0 + 0] = scale * v[2]
    out[r0 + 1, c0 + 1] = 0.0
    out[r0 + 1, c0 + 2] = -scale * v[0]
    out[r0 + 2, c0 + 0] = -scale * v[1]
    out[r0 + 2, c0 + 1] = scale * v[0]
    out[r0 + 2, c0 + 2] = 0.0


@njit(cache=True)
def _skew(v):
    s = np.empty((3, 3))
    _skew_into(v, s, 0, 0, 1.0)
    return s


@njit(cache=True)
def _cross(a, b):
    out = np.empty(3)
    out[0] = a[1] * b[2] - a[2] * b[1]
    out[1] = a[2] * b[0] - a[0] * b[2]
    out[2] = a[0] * b[1] - a[1] * b[0]
    return out


@njit(cache=True)
def _cholesky_solve(a, b, lwork, out):
    """Solve a x = b for symmetric positive-definite a (N x N), b (N x N). Returns False if not SPD.

    ``lwork`` receives the Cholesky factor L (row i, column j <= i); its diagonal holds 1 / L_ii.
    Rows of all right-hand sides are processed together so the inner loops run over contiguous memory.
    """
    for i in range(N):
        for j in range(i + 1):
            s = a[i, j]
            for k in range(j):
                s -= lwork[i, k] * lwork[j, k]
            if i == j:
                if s <= 0.0:
                    return False
                lwork[i, i] = 1.0 / np.sqrt(s)
            else:
                lwork[i, j] = s * lwork[j, j]
    for i in range(N):
        for c in range(N):
            out[i, c] = b[i, c]
        for k in range(i):
            lik = lwork[i, k]
            for c in range(N):
                out[i, c] -= lik * out[k, c]
        d = lwork[i, i]
        for c in range(N):
            out[i, c] *= d
    for i in range(N - 1, -1, -1):
        for k in range(i + 1, N):
            lki = lwork[k, i]
            for c in range(N):
                out[i, c] -= lki * out[k, c]
        d = lwork[i, i]
        for c in range(N):
            out[i, c] *= d
    return True


# ----------------------------------------------------------------------------- gyro propagation
@njit(cache=True)
def gyro_transition(w, dt, phi):
    """Fill phi[0:3, 0:6] for a rate w (rad/s, body) held over dt.

    ``phi11 = exp(-[w x] dt) = I - (sin th / |w|) [w x] + ((1 - cos th) / |w|^2) [w x]^2`` and
    ``phi12 = -int_0^dt exp(-[w x] s) ds = -(I dt - ((1 - cos th)/|w|^2) [w x] + ((th - sin th)/|w|^3)
    [w x]^2)``, th = |w| dt: the closed forms of Crassidis & Junkins (2012) ch. 7 (memory) in this error
    convention. ``[w x]^2 = w w^T - |w|^2 I``.
    """
    w2 = w[0] * w[0] + w[1] * w[1] + w[2] * w[2]
    wn = np.sqrt(w2)
    th = wn * dt
    if th < 1e-4:
        # Taylor series to the next order keep the 1e-12 agreement with the exact form near zero
        c1 = dt * (1.0 - th * th / 6.0)                    # sin(th)/|w|
        c2 = dt * dt * (0.5 - th * th / 24.0)              # (1 - cos th)/|w|^2
        c3 = dt * dt * dt * (1.0 / 6.0 - th * th / 120.0)  # (th - sin th)/|w|^3
    else:
        c1 = np.sin(th) / wn
        c2 = (1.0 - np.cos(th)) / w2
        c3 = (th - np.sin(th)) / (w2 * wn)
    for i in range(3):
        for j in range(3):
            sk = 0.0
            if i != j:
                kidx = 3 - i - j
                sgn = 1.0 if (j - i) % 3 == 1 else -1.0  # [w x]_ij = -eps_ijk w_k
                sk = -sgn * w[kidx]
            sk2 = w[i] * w[j] - (w2 if i == j else 0.0)
            eye = 1.0 if i == j else 0.0
            phi[i, j] = eye - c1 * sk + c2 * sk2
            phi[i, 3 + j] = -(eye * dt - c2 * sk + c3 * sk2)


@njit(cache=True)
def _field_decay(dt, prm):
    """Gauss-Markov factor e = exp(-dt/tau_f) and its process noise sig_f^2 (1 - e^2); e = 0 if tau_f <= 0."""
    tau = prm[P_TAUF]
    e = np.exp(-dt / tau) if tau > 0.0 else 0.0
    return e, prm[P_SIGF] * prm[P_SIGF] * (1.0 - e * e)


@njit(cache=True)
def _gyro_noise(dt, s0, extra, prm):
    """Discrete Q coefficients (a11, a12, a22) of one gyro step (see the module docstring).

    s0: time since the held gyro sample was taken, at the start of the step; extra: added bias
    variance (a bias step allowed at this step, rad^2/s^2).
    """
    sv2 = prm[P_SV] * prm[P_SV]
    su2 = prm[P_SU] * prm[P_SU]
    a11 = sv2 * dt + su2 * dt * dt * dt / 3.0
    # growth of error while a gyro sample is held past its nominal interval h (a gap): the held
    # sample's own noise (variance sv^2/h, times s^2) and an unknown steady angular acceleration
    # (error acc s^2 / 2, variance acc^2 s^4 / 4)
    h = prm[P_HNOM]
    s1 = s0 + dt
    acc = prm[P_ACC]
    a11 += acc * acc * (s1 * s1 * s1 * s1 - s0 * s0 * s0 * s0) / 4.0
    if s1 > h and h > 0.0:
        sa = s0 if s0 > h else h
        a11 += sv2 * ((s1 * s1 - sa * sa) / h - (s1 - sa))
    return a11, -0.5 * su2 * dt * dt, su2 * dt + extra


@njit(cache=True)
def propagate_gyro(q, beta, db, u, dt, prm, phi, qd):
    """One gyro-mode step, reference form: returns (q_next, beta_next, db_next) and fills the full
    Phi and Q (N x N). ``u = [w_meas (3), s0, extra]``: the held gyro sample (rad/s, body), the time
    since it was taken (s) and an extra bias variance for this step (rad^2/s^2, zero except where a
    bias jump was found). The passes use the same formulas through :func:`_predict_into`.
    """
    w = np.empty(3)
    for i in range(3):
        w[i] = u[i] - beta[i]
    qn = np.empty(4)
    _rot_step_into(-w[0] * dt, -w[1] * dt, -w[2] * dt, q, qn)
    phi[:, :] = 0.0
    qd[:, :] = 0.0
    gyro_transition(w, dt, phi)
    a11, a12, a22 = _gyro_noise(dt, u[3], u[4] if u.shape[0] > 4 else 0.0, prm)
    e, q33 = _field_decay(dt, prm)
    dbn = np.empty(3)
    for i in range(3):
        phi[3 + i, 3 + i] = 1.0
        phi[6 + i, 6 + i] = e
        qd[i, i] = a11
        qd[i, 3 + i] = a12
        qd[3 + i, i] = a12
        qd[3 + i, 3 + i] = a22
        qd[6 + i, 6 + i] = q33
        dbn[i] = e * db[i]
    return qn, beta.copy(), dbn


# ------------------------------------------------------------------------- dynamics propagation
@njit(cache=True)
def _torque(q, w, m_body, b_gcrf_nT, r_gcrf_km, prm):
    """Magnetic m x B plus gravity gradient, N m, body; also returns J w for reuse."""
    a = attitude_matrix(q)
    bb = a @ b_gcrf_nT * 1e-9
    tau = _cross(m_body, bb)
    rn = np.sqrt(r_gcrf_km[0] ** 2 + r_gcrf_km[1] ** 2 + r_gcrf_km[2] ** 2)
    if rn > 0.0:
        nb = a @ r_gcrf_km / rn
        jn = np.empty(3)
        for i in range(3):
            jn[i] = prm[P_J + 3 * i] * nb[0] + prm[P_J + 3 * i + 1] * nb[1] + prm[P_J + 3 * i + 2] * nb[2]
        k = 3.0 * prm[P_MU] / (rn * 1e3) ** 3
        g = _cross(nb, jn)
        for i in range(3):
            tau[i] += k * g[i]
    return tau


@njit(cache=True)
def _wdot(q, w, m_body, b, r, prm):
    tau = _torque(q, w, m_body, b, r, prm)
    jw = np.empty(3)
    for i in range(3):
        jw[i] = prm[P_J + 3 * i] * w[0] + prm[P_J + 3 * i + 1] * w[1] + prm[P_J + 3 * i + 2] * w[2]
    rhs = tau - _cross(w, jw)
    out = np.empty(3)
    for i in range(3):
        out[i] = prm[P_JINV + 3 * i] * rhs[0] + prm[P_JINV + 3 * i + 1] * rhs[1] + prm[P_JINV + 3 * i + 2] * rhs[2]
    return out


@njit(cache=True)
def _qdot(q, w):
    """dq/dt = -1/2 (w, 0) (x) q (scalar-last Hamilton)."""
    hw = np.empty(4)
    hw[0] = -0.5 * w[0]
    hw[1] = -0.5 * w[1]
    hw[2] = -0.5 * w[2]
    hw[3] = 0.0
    return qmul(hw, q)


@njit(cache=True)
def rk4_rigid_body(q, w, dt, m_body, b0, b1, r0, r1, prm):
    """One RK4 step of kinematics and Euler's equations; field and position linear in time."""
    bm = 0.5 * (b0 + b1)
    rm = 0.5 * (r0 + r1)
    k1q = _qdot(q, w)
    k1w = _wdot(q, w, m_body, b0, r0, prm)
    q2 = q + 0.5 * dt * k1q
    w2 = w + 0.5 * dt * k1w
    k2q = _qdot(q2, w2)
    k2w = _wdot(q2, w2, m_body, bm, rm, prm)
    q3 = q + 0.5 * dt * k2q
    w3 = w + 0.5 * dt * k2w
    k3q = _qdot(q3, w3)
    k3w = _wdot(q3, w3, m_body, bm, rm, prm)
    q4 = q + dt * k3q
    w4 = w + dt * k3w
    k4q = _qdot(q4, w4)
    k4w = _wdot(q4, w4, m_body, b1, r1, prm)
    qn = q + dt / 6.0 * (k1q + 2.0 * k2q + 2.0 * k3q + k4q)
    wn = w + dt / 6.0 * (k1w + 2.0 * k2w + 2.0 * k3w + k4w)
    return qnormalize(qn), wn


@njit(cache=True)
def dynamics_jacobian(q, w, m_body, b_gcrf_nT, r_gcrf_km, prm, f):
    """Fill f[0:6, 0:6] with the error-state Jacobian of the dynamics mode."""
    a = attitude_matrix(q)
    bb = a @ b_gcrf_nT * 1e-9
    sk_w = _skew(w)
    jm = np.empty((3, 3))
    jinv = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            jm[i, j] = prm[P_J + 3 * i + j]
            jinv[i, j] = prm[P_JINV + 3 * i + j]
    # d tau / d dtheta: magnetic [m x][b x]; gravity gradient k (-[Jn x] + [n x] J) [n x]
    t_th = _skew(m_body) @ _skew(bb)
    rn = np.sqrt(r_gcrf_km[0] ** 2 + r_gcrf_km[1] ** 2 + r_gcrf_km[2] ** 2)
    if rn > 0.0:
        nb = a @ r_gcrf_km / rn
        k = 3.0 * prm[P_MU] / (rn * 1e3) ** 3
        t_th += k * ((-_skew(jm @ nb) + _skew(nb) @ jm) @ _skew(nb))
    f_wth = jinv @ t_th
    f_ww = jinv @ (_skew(jm @ w) - sk_w @ jm)
    for i in range(3):
        for j in range(3):
            f[i, j] = -sk_w[i, j]
            f[i, 3 + j] = 1.0 if i == j else 0.0
            f[3 + i, j] = f_wth[i, j]
            f[3 + i, 3 + j] = f_ww[i, j]


@njit(cache=True)
def propagate_dynamics(q, w, db, u, b0, b1, dt, prm, phi, qd):
    """One dynamics-mode step: returns (q_next, w_next, db_next); fills phi and qd.

    ``u = [m_body (3) A m^2, r0 (3) km, r1 (3) km]``: the mean coil dipole over the step and the
    position at both ends; b0, b1: reference field (GCRF, nT) at both ends.
    """
    m_body = u[0:3].copy()
    r0 = u[3:6].copy()
    r1 = u[6:9].copy()
    qn, wn = rk4_rigid_body(q, w, dt, m_body, b0, b1, r0, r1, prm)
    # Jacobian averaged over the step's two ends: the change of F along the step (dF/dt dt^2/2)
    # is then in Phi too, leaving an error of third order in dt
    f = np.zeros((6, 6))
    f1 = np.zeros((6, 6))
    dynamics_jacobian(q, w, m_body, b0, r0, prm, f)
    dynamics_jacobian(qn, wn, m_body, b1, r1, prm, f1)
    for i in range(6):
        for j in range(6):
            f[i, j] = 0.5 * (f[i, j] + f1[i, j])
    for i in range(N):
        for j in range(N):
            phi[i, j] = 0.0
            qd[i, j] = 0.0
    # Phi = I + F dt + F^2 dt^2 / 2 on the attitude-rate block (F averaged over the step)
    f2 = f @ f
    for i in range(6):
        for j in range(6):
            phi[i, j] = (1.0 if i == j else 0.0) + f[i, j] * dt + 0.5 * f2[i, j] * dt * dt
    # white unmodelled torque: angular acceleration PSD Qa = J^-1 sig^2 J^-T, with
    # sig^2 = sig_abs^2 + (rel |m x B|)^2 x 1 s: disturbances plus an error of the coil dipole
    # proportional to the commanded torque (gain and alignment), correlated over about a second
    a = attitude_matrix(q)
    tm = _cross(m_body, a @ b0 * 1e-9)
    tmag2 = tm[0] * tm[0] + tm[1] * tm[1] + tm[2] * tm[2]
    st2 = prm[P_SIGTAU] * prm[P_SIGTAU] + prm[P_TAUREL] * prm[P_TAUREL] * tmag2 * 1.0
    for i in range(3):
        for j in range(3):
            s = 0.0
            for k in range(3):
                s += prm[P_JINV + 3 * i + k] * prm[P_JINV + 3 * j + k]
            qa = st2 * s
            qd[i, j] = qa * dt * dt * dt / 3.0
            qd[i, 3 + j] = qa * dt * dt / 2.0
            qd[3 + i, j] = qa * dt * dt / 2.0
            qd[3 + i, 3 + j] = qa * dt
    e, q33 = _field_decay(dt, prm)
    dbn = np.empty(3)
    for i in range(3):
        phi[6 + i, 6 + i] = e
        qd[6 + i, 6 + i] = q33
        dbn[i] = e * db[i]
    return qn, wn, dbn


@njit(cache=True)
def _predict_into(mode, k, q, v, db, t, u, r, prm, p, qn, vn, dbn, m, pm, blk, w3, phi, qd):
    """Prediction k -> k+1 in place: state into (qn, vn, dbn), ``m = Phi P``, ``pm = Phi P Phi^T + Q``.

    Gyro mode uses the block structure ``Phi = [[A, B, 0], [0, I, 0], [0, 0, e I]]`` (blk = [A B],
    3 x 6); dynamics mode a dense attitude-rate block from :func:`propagate_dynamics`.
    """
    dt = t[k + 1] - t[k]
    if mode == MODE_GYRO:
        for i in range(3):
            w3[i] = u[k, i] - v[i]
            vn[i] = v[i]
        _rot_step_into(-w3[0] * dt, -w3[1] * dt, -w3[2] * dt, q, qn)
        gyro_transition(w3, dt, blk)
        a11, a12, a22 = _gyro_noise(dt, u[k, 3], u[k, 4] if u.shape[1] > 4 else 0.0, prm)
        e, q33 = _field_decay(dt, prm)
        for i in range(3):
            dbn[i] = e * db[i]
        for i in range(3):
            for j in range(N):
                m[i, j] = 0.0
            for c in range(6):
                bc = blk[i, c]
                for j in range(N):
                    m[i, j] += bc * p[c, j]
        for i in range(3, 6):
            for j in range(N):
                m[i, j] = p[i, j]
        for i in range(6, N):
            for j in range(N):
                m[i, j] = e * p[i, j]
        for i in range(N):
            for j in range(i, N):
                if j < 3:
                    acc_ = 0.0
                    for c in range(6):
                        acc_ += m[i, c] * blk[j, c]
                elif j < 6:
                    acc_ = m[i, j]
                else:
                    acc_ = e * m[i, j]
                pm[i, j] = acc_
        for i in range(3):
            pm[i, i] += a11
            pm[i, 3 + i] += a12
            pm[3 + i, 3 + i] += a22
            pm[6 + i, 6 + i] += q33
        for i in range(N):
            for j in range(i + 1, N):
                pm[j, i] = pm[i, j]
        return
    q2, v2, db2 = propagate_dynamics(q, v, db, u[k], r[k], r[k + 1], dt, prm, phi, qd)
    for i in range(4):
        qn[i] = q2[i]
    for i in range(3):
        vn[i] = v2[i]
        dbn[i] = db2[i]
    for i in range(N):
        for j in range(N):
            acc_ = 0.0
            for c in range(N):
                f = phi[i, c]
                if f != 0.0:
                    acc_ += f * p[c, j]
            m[i, j] = acc_
    for i in range(N):
        for j in range(i, N):
            acc_ = qd[i, j]
            for c in range(N):
                f = phi[j, c]
                if f != 0.0:
                    acc_ += m[i, c] * f
            pm[i, j] = acc_
            pm[j, i] = acc_


# ------------------------------------------------------------------------------ vector update
@njit(cache=True)
def _update_into(q, v, db, p, z, b_ref, prm, innov, qn, vn, dbn, a, pht, kg, dx):
    """Vector update in place (work arrays a (3, 3), pht (N, 3), kg (N, 3), dx (N,)); returns NIS.

    ``h(x) = A(q) (b_ref + db)``, ``H = [[h x], 0, A]``, ``R = sig_m^2 I``. The covariance update is Joseph's form
    ``(I - K H) P (I - K H)^T + K R K^T``, evaluated as ``P - K (H P) - (K (H P))^T + K S K^T``, which
    is the same expression multiplied out (valid for any gain K) at a third of the cost.
    """
    _attitude_matrix_into(q, a)
    r0 = b_ref[0] + db[0]
    r1 = b_ref[1] + db[1]
    r2 = b_ref[2] + db[2]
    h0 = a[0, 0] * r0 + a[0, 1] * r1 + a[0, 2] * r2
    h1 = a[1, 0] * r0 + a[1, 1] * r1 + a[1, 2] * r2
    h2 = a[2, 0] * r0 + a[2, 1] * r1 + a[2, 2] * r2
    r = prm[P_SIGM] * prm[P_SIGM]
    innov[0] = z[0] - h0
    innov[1] = z[1] - h1
    innov[2] = z[2] - h2
    # P H^T: the attitude block of H is [h x] (so column c of P H^T is P[:, 0:3] . row c of [h x]),
    # the field block is A
    for i in range(N):
        p0, p1, p2 = p[i, 0], p[i, 1], p[i, 2]
        pht[i, 0] = -h2 * p1 + h1 * p2
        pht[i, 1] = h2 * p0 - h0 * p2
        pht[i, 2] = -h1 * p0 + h0 * p1
        f0, f1, f2 = p[i, 6], p[i, 7], p[i, 8]
        pht[i, 0] += a[0, 0] * f0 + a[0, 1] * f1 + a[0, 2] * f2
        pht[i, 1] += a[1, 0] * f0 + a[1, 1] * f1 + a[1, 2] * f2
        pht[i, 2] += a[2, 0] * f0 + a[2, 1] * f1 + a[2, 2] * f2
    # S = H P H^T + R (rows of H applied to the columns of P H^T)
    s00 = -h2 * pht[1, 0] + h1 * pht[2, 0]
    s01 = -h2 * pht[1, 1] + h1 * pht[2, 1]
    s02 = -h2 * pht[1, 2] + h1 * pht[2, 2]
    s11 = h2 * pht[0, 1] - h0 * pht[2, 1]
    s12 = h2 * pht[0, 2] - h0 * pht[2, 2]
    s22 = -h1 * pht[0, 2] + h0 * pht[1, 2]
    s00 += a[0, 0] * pht[6, 0] + a[0, 1] * pht[7, 0] + a[0, 2] * pht[8, 0]
    s01 += a[0, 0] * pht[6, 1] + a[0, 1] * pht[7, 1] + a[0, 2] * pht[8, 1]
    s02 += a[0, 0] * pht[6, 2] + a[0, 1] * pht[7, 2] + a[0, 2] * pht[8, 2]
    s11 += a[1, 0] * pht[6, 1] + a[1, 1] * pht[7, 1] + a[1, 2] * pht[8, 1]
    s12 += a[1, 0] * pht[6, 2] + a[1, 1] * pht[7, 2] + a[1, 2] * pht[8, 2]
    s22 += a[2, 0] * pht[6, 2] + a[2, 1] * pht[7, 2] + a[2, 2] * pht[8, 2]
    s00 += r
    s11 += r
    s22 += r
    # inverse of the symmetric 3x3 S by cofactors
    c00 = s11 * s22 - s12 * s12
    c01 = s02 * s12 - s01 * s22
    c02 = s01 * s12 - s02 * s11
    det = s00 * c00 + s01 * c01 + s02 * c02
    i00 = c00 / det
    i01 = c01 / det
    i02 = c02 / det
    i11 = (s00 * s22 - s02 * s02) / det
    i12 = (s02 * s01 - s00 * s12) / det
    i22 = (s00 * s11 - s01 * s01) / det
    nis = (innov[0] * (i00 * innov[0] + i01 * innov[1] + i02 * innov[2])
           + innov[1] * (i01 * innov[0] + i11 * innov[1] + i12 * innov[2])
           + innov[2] * (i02 * innov[0] + i12 * innov[1] + i22 * innov[2]))
    for i in range(N):
        e0, e1, e2 = pht[i, 0], pht[i, 1], pht[i, 2]
        k0 = e0 * i00 + e1 * i01 + e2 * i02
        k1 = e0 * i01 + e1 * i11 + e2 * i12
        k2 = e0 * i02 + e1 * i12 + e2 * i22
        kg[i, 0] = k0
        kg[i, 1] = k1
        kg[i, 2] = k2
        dx[i] = k0 * innov[0] + k1 * innov[1] + k2 * innov[2]
    # Joseph form multiplied out: P - K (H P) - (K (H P))^T + K S K^T, with H P = (P H^T)^T
    for i in range(N):
        k0, k1, k2 = kg[i, 0], kg[i, 1], kg[i, 2]
        ks0 = k0 * s00 + k1 * s01 + k2 * s02
        ks1 = k0 * s01 + k1 * s11 + k2 * s12
        ks2 = k0 * s02 + k1 * s12 + k2 * s22
        for j in range(i, N):
            val = (p[i, j] - (k0 * pht[j, 0] + k1 * pht[j, 1] + k2 * pht[j, 2])
                   - (kg[j, 0] * pht[i, 0] + kg[j, 1] * pht[i, 1] + kg[j, 2] * pht[i, 2])
                   + ks0 * kg[j, 0] + ks1 * kg[j, 1] + ks2 * kg[j, 2])
            p[i, j] = val
            p[j, i] = val
    _rot_step_into(-dx[0], -dx[1], -dx[2], q, qn)
    for i in range(3):
        vn[i] = v[i] + dx[3 + i]
        dbn[i] = db[i] + dx[6 + i]
    return nis


@njit(cache=True)
def vector_update(q, v, db, p, z, b_ref, prm, innov):
    """Update with one body-frame field measurement z (nT) against the GCRF reference b_ref (nT).

    P (N x N) is updated in place; returns (q, v, db, nis); ``innov`` (3,) receives z - h(x). The
    allocating form of :func:`_update_into`, which the passes use.
    """
    qn = np.empty(4)
    vn = np.empty(3)
    dbn = np.empty(3)
    nis = _update_into(q, v, db, p, z, b_ref, prm, innov, qn, vn, dbn, np.empty((3, 3)), np.empty((N, 3)),
                       np.empty((N, 3)), np.empty(N))
    return qn, vn, dbn, nis


# --------------------------------------------------------------------------------- the passes
@njit(cache=True)
def forward_pass(mode, t, u, is_mag, z, r, prm, q0, v0, db0, p0,
                 q_out, v_out, db_out, p_out, nis_out, innov_out):
    """Forward MEKF over K steps. Step k sits at t[k]; propagation k-1 -> k uses u[k-1].

    Outputs (filled): q_out (K, 4), v_out (K, 3), db_out (K, 3), p_out (K, NP) the covariance after
    the update at each step, upper triangle row by row (see :func:`unpack_covariance`); nis_out (K,)
    and innov_out (K, 3), NaN where there is no update.
    """
    kk = t.shape[0]
    q, v, db, p = q0.copy(), v0.copy(), db0.copy(), p0.copy()
    q2, v2, db2, p2 = np.empty(4), np.empty(3), np.empty(3), np.empty((N, N))
    m = np.empty((N, N))
    blk = np.zeros((3, 6))
    w3 = np.empty(3)
    phi = np.zeros((N, N))
    qd = np.zeros((N, N))
    a3 = np.empty((3, 3))
    pht = np.empty((N, 3))
    kg = np.empty((N, 3))
    dx = np.empty(N)
    innov = np.empty(3)
    for k in range(kk):
        if k > 0:
            _predict_into(mode, k - 1, q, v, db, t, u, r, prm, p, q2, v2, db2, m, p2, blk, w3, phi, qd)
            q, q2 = q2, q
            v, v2 = v2, v
            db, db2 = db2, db
            p, p2 = p2, p
        if is_mag[k]:
            nis_out[k] = _update_into(q, v, db, p, z[k], r[k], prm, innov, q2, v2, db2, a3, pht, kg, dx)
            q, q2 = q2, q
            v, v2 = v2, v
            db, db2 = db2, db
            innov_out[k, 0] = innov[0]
            innov_out[k, 1] = innov[1]
            innov_out[k, 2] = innov[2]
        else:
            nis_out[k] = np.nan
            innov_out[k, 0] = np.nan
            innov_out[k, 1] = np.nan
            innov_out[k, 2] = np.nan
        for i in range(4):
            q_out[k, i] = q[i]
        for i in range(3):
            v_out[k, i] = v[i]
            db_out[k, i] = db[i]
        c = 0
        for i in range(N):
            for j in range(i, N):
                p_out[k, c] = p[i, j]
                c += 1
    return 0


@njit(cache=True)
def _unpack_into(packed, out):
    c = 0
    for i in range(N):
        for j in range(i, N):
            out[i, j] = packed[c]
            out[j, i] = packed[c]
            c += 1


def unpack_covariance(packed: np.ndarray, size: int = N) -> np.ndarray:
    """(K, NP) packed upper triangles -> (K, size, size) symmetric blocks (the leading size x size)."""
    iu = np.triu_indices(N)
    full = np.empty((packed.shape[0], N, N))
    full[:, iu[0], iu[1]] = packed
    full[:, iu[1], iu[0]] = packed
    return np.ascontiguousarray(full[:, :size, :size])


@njit(cache=True)
def smoother_pass(mode, t, u, r, prm, q_f, v_f, db_f, p_f, out_idx,
                  q_s, v_s, db_s, p_s6, p_sfull):
    """Rauch-Tung-Striebel smoother in error-state form over the stored forward pass.

    ``Ks = P+_k Phi^T (P-_{k+1})^-1``; ``dx_k = Ks (x_s,k+1 [-] x-_{k+1})`` with the attitude part
    the small rotation from the predicted to the smoothed quaternion; ``P_s,k = P+_k - Ks (P-_{k+1} -
    P_s,k+1) Ks^T`` (Crassidis & Junkins 2012 ex. 5.1). The correction is applied multiplicatively
    to the forward quaternion. p_f (K, NP) holds the forward covariances packed as by
    :func:`forward_pass`. q_s, v_s, db_s (K, .) are filled for every step; p_s6 (M, 6, 6)
    receives the attitude/rate block at steps with out_idx[k] >= 0 (its row). When p_sfull has K
    rows the full smoothed covariance is stored too.
    Returns the number of steps where P- was not positive definite (smoother gain set to zero).
    """
    kk = t.shape[0]
    qm, vm, dbm = np.empty(4), np.empty(3), np.empty(3)
    m = np.empty((N, N))
    pm = np.empty((N, N))
    blk = np.zeros((3, 6))
    w3 = np.empty(3)
    phi = np.zeros((N, N))
    qd = np.zeros((N, N))
    pk = np.empty((N, N))
    ps = np.empty((N, N))
    _unpack_into(p_f[kk - 1], ps)
    lwork = np.zeros((N, N))
    x = np.zeros((N, N))
    tmp = np.zeros((N, N))
    dx1 = np.zeros(N)
    dxk = np.zeros(N)
    qc = np.empty(4)
    bad = 0
    store_full = p_sfull.shape[0] == kk
    q_s[kk - 1, :] = q_f[kk - 1]
    v_s[kk - 1, :] = v_f[kk - 1]
    db_s[kk - 1, :] = db_f[kk - 1]
    if out_idx[kk - 1] >= 0:
        p_s6[out_idx[kk - 1], :, :] = ps[0:6, 0:6]
    if store_full:
        p_sfull[kk - 1, :, :] = ps
    for k in range(kk - 2, -1, -1):
        _unpack_into(p_f[k], pk)
        _predict_into(mode, k, q_f[k], v_f[k], db_f[k], t, u, r, prm, pk, qm, vm, dbm, m, pm, blk, w3, phi, qd)
        # error of the smoothed state at k+1 relative to the prediction: q_s = q(-dtheta) (x) q-
        # qe = q_s,k+1 (x) conj(q-): Hamilton product written out, then its rotation vector
        ax, ay, az, aw = q_s[k + 1, 0], q_s[k + 1, 1], q_s[k + 1, 2], q_s[k + 1, 3]
        bx, by, bz, bw = -qm[0], -qm[1], -qm[2], qm[3]
        ex = aw * bx + bw * ax + ay * bz - az * by
        ey = aw * by + bw * ay + az * bx - ax * bz
        ez = aw * bz + bw * az + ax * by - ay * bx
        ew = aw * bw - ax * bx - ay * by - az * bz
        if ew < 0.0:
            ex, ey, ez, ew = -ex, -ey, -ez, -ew
        sn = np.sqrt(ex * ex + ey * ey + ez * ez)
        f = 2.0 / ew if sn < 1e-12 else 2.0 * np.arctan2(sn, ew) / sn
        dx1[0] = -f * ex
        dx1[1] = -f * ey
        dx1[2] = -f * ez
        for i in range(3):
            dx1[3 + i] = v_s[k + 1, i] - vm[i]
        for i in range(3):
            dx1[6 + i] = db_s[k + 1, i] - dbm[i]
        # Ks^T = (P-)^-1 (Phi P+)   (P symmetric), m = Phi P+
        ok = _cholesky_solve(pm, m, lwork, x)
        if not ok:
            bad += 1
            for i in range(N):
                for j in range(N):
                    x[i, j] = 0.0
        for i in range(N):
            dxk[i] = 0.0
        for c in range(N):
            d1 = dx1[c]
            for i in range(N):
                dxk[i] += x[c, i] * d1
        _rot_step_into(-dxk[0], -dxk[1], -dxk[2], q_f[k], qc)
        for i in range(4):
            q_s[k, i] = qc[i]
        for i in range(3):
            v_s[k, i] = v_f[k, i] + dxk[3 + i]
            db_s[k, i] = db_f[k, i] + dxk[6 + i]
        # P_s,k = P+ - Ks (P- - P_s,k+1) Ks^T ; tmp = Ks D = x^T D (loops ordered for contiguous rows)
        for i in range(N):
            for j in range(N):
                pm[i, j] -= ps[i, j]
                tmp[i, j] = 0.0
        for c in range(N):
            for i in range(N):
                xci = x[c, i]
                for j in range(N):
                    tmp[i, j] += xci * pm[c, j]
        for i in range(N):
            for j in range(i, N):
                ps[i, j] = pk[i, j]
            for c in range(N):
                tic = tmp[i, c]
                for j in range(i, N):
                    ps[i, j] -= tic * x[c, j]
            for j in range(i + 1, N):
                ps[j, i] = ps[i, j]
        if out_idx[k] >= 0:
            row = out_idx[k]
            for i in range(6):
                for j in range(6):
                    p_s6[row, i, j] = ps[i, j]
        if store_full:
            p_sfull[k, :, :] = ps
    return bad
