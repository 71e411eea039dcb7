"""Compiled inner loops of the attitude filter: propagation, vector update, forward pass, RTS smoother.

Plain float arrays in, plain float arrays out; every function is a pure function of its arguments
(the output arrays are filled in place and are the only thing written). Units: s, rad, rad/s, nT,
A m^2, N m, m^3/s^2; frames as in :mod:`recon.frames`.

Quaternions are scalar-last and follow scipy's convention (Hamilton product, ``A(q) v_gcrf =
v_body``); the kinematics is ``dA/dt = -[w x] A``, so one step with a constant body rate w is
``q(t + dt) = q(-w dt) (x) q(t)``, with ``q(v)`` the quaternion of rotation vector v.

Error state (the multiplicative EKF of Lefferts, Markley & Shuster 1982): ``dx = [dtheta, dv, db]``
with ``A_true = (I - [dtheta x]) A_est`` (the attitude error in body axes, as in Markley & Crassidis
2014 sec. 6.2), ``dv`` the error of the gyro bias (gyro mode) or of the body rate (dynamics mode),
and ``db`` the error of the estimated field-model error (GCRF, nT; present when n = 9).

- Gyro mode (Markley & Crassidis 2014 sec. 6.2.3): ``F = [[-[w x], -I], [0, 0]]``; the discrete
  Phi is the exact transition for a rate held over the step; the discrete Q is the one of Crassidis &
  Junkins 2012 eq. 7.43 (ARW ``sv``, rate random walk ``su``), plus the growth of attitude error while
  a gyro sample is held for longer than its nominal interval (a gap in the gyro log): held white
  noise ``sv^2 s^2 / h`` and an unknown, steady angular acceleration ``acc`` (the rate keeps changing
  while it is held) giving ``acc^2 s^4 / 4``.
- Dynamics mode (rate from Euler's equations, as in Psiaki, Martel & Pal 1990): attitude and body
  rate integrated with RK4 under magnetic torque ``m x B`` and gravity gradient ``3 mu/|r|^3 (n x J n)``;
  ``F = [[-[w x], I], [J^-1 (T_theta), J^-1 ([Jw x] - [w x] J)]]``; Phi to second order in dt with
  F averaged over the step's ends;
  Q from a white unmodelled torque.
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
Eq. 7.43 (gyro Q), ex. 5.1 (Rauch-Tung-Striebel smoother).
Rauch, H. E., Tung, F. and Striebel, C. T. (1965). Maximum likelihood estimates of linear dynamic
systems. AIAA J. 3(8), 1445-1450.
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Bryson, A. E. and Henrikson, L. J. (1968). Estimation using sampled data containing sequentially
correlated noise. J. Spacecraft 5(6), 662-665.
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
def attitude_matrix(q):
    """A(q) with ``A @ v_gcrf = v_body`` (scipy ``as_matrix``)."""
    x, y, z, w = q[0], q[1], q[2], q[3]
    a = np.empty((3, 3))
    a[0, 0] = w * w + x * x - y * y - z * z
    a[0, 1] = 2.0 * (x * y - z * w)
    a[0, 2] = 2.0 * (x * z + y * w)
    a[1, 0] = 2.0 * (x * y + z * w)
    a[1, 1] = w * w - x * x + y * y - z * z
    a[1, 2] = 2.0 * (y * z - x * w)
    a[2, 0] = 2.0 * (x * z - y * w)
    a[2, 1] = 2.0 * (y * z + x * w)
    a[2, 2] = w * w - x * x - y * y + z * z
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
def _sym_prop(phi, p, q, n, tmp, out):
    """out = phi p phi^T + q for n x n blocks (phi dense but mostly zero: zeros skipped)."""
    for i in range(n):
        for j in range(n):
            s = 0.0
            for k in range(n):
                f = phi[i, k]
                if f != 0.0:
                    s += f * p[k, j]
            tmp[i, j] = s
    for i in range(n):
        for j in range(i, n):
            s = q[i, j]
            for k in range(n):
                f = phi[j, k]
                if f != 0.0:
                    s += tmp[i, k] * f
            out[i, j] = s
            out[j, i] = s


@njit(cache=True)
def _cholesky_solve(a, b, n, m, lwork, out):
    """Solve a x = b for symmetric positive-definite a (n x n), b (n x m). Returns False if not SPD."""
    for i in range(n):
        for j in range(i + 1):
            s = a[i, j]
            for k in range(j):
                s -= lwork[i, k] * lwork[j, k]
            if i == j:
                if s <= 0.0:
                    return False
                lwork[i, i] = np.sqrt(s)
            else:
                lwork[i, j] = s / lwork[j, j]
    for c in range(m):
        for i in range(n):
            s = b[i, c]
            for k in range(i):
                s -= lwork[i, k] * out[k, c]
            out[i, c] = s / lwork[i, i]
        for i in range(n - 1, -1, -1):
            s = out[i, c]
            for k in range(i + 1, n):
                s -= lwork[k, i] * out[k, c]
            out[i, c] = s / lwork[i, i]
    return True


# ----------------------------------------------------------------------------- gyro propagation
@njit(cache=True)
def gyro_transition(w, dt, phi):
    """Fill phi[0:3, 0:6] for a rate w (rad/s, body) held over dt.

    ``phi11 = exp(-[w x] dt) = I - (sin th / |w|) [w x] + ((1 - cos th) / |w|^2) [w x]^2`` and
    ``phi12 = -int_0^dt exp(-[w x] s) ds = -(I dt - ((1 - cos th)/|w|^2) [w x] + ((th - sin th)/|w|^3)
    [w x]^2)``, th = |w| dt: the closed forms of Crassidis & Junkins (2012) sec. 7.2.2 in this error
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
def propagate_gyro(q, beta, db, u, dt, prm, n, phi, qd):
    """One gyro-mode step: returns (q_next, beta_next, db_next); fills phi and qd (n x n).

    ``u = [w_meas (3), s0, q_step]``: the held gyro sample (rad/s, body), the time since it was taken
    at the start of the step (s) and an extra bias variance for this step (rad^2/s^2; zero except
    where a bias jump was found).
    """
    w = np.empty(3)
    for i in range(3):
        w[i] = u[i] - beta[i]
    qn = qnormalize(qmul(quat_from_rotvec(-w[0] * dt, -w[1] * dt, -w[2] * dt), q))
    for i in range(n):
        for j in range(n):
            phi[i, j] = 0.0
            qd[i, j] = 0.0
    gyro_transition(w, dt, phi)
    for i in range(3, 6):
        phi[i, i] = 1.0
    sv2 = prm[P_SV] * prm[P_SV]
    su2 = prm[P_SU] * prm[P_SU]
    a11 = sv2 * dt + su2 * dt * dt * dt / 3.0
    # growth of error while a gyro sample is held past its nominal interval h (a gap): the held
    # sample's own noise (variance sv^2/h, times s^2) and an unknown steady angular acceleration
    # (error acc s^2 / 2, variance acc^2 s^4 / 4).
    h = prm[P_HNOM]
    s0 = u[3]
    s1 = s0 + dt
    acc = prm[P_ACC]
    a11 += acc * acc * (s1 * s1 * s1 * s1 - s0 * s0 * s0 * s0) / 4.0
    if s1 > h and h > 0.0:
        sa = s0 if s0 > h else h
        a11 += sv2 * ((s1 * s1 - sa * sa) / h - (s1 - sa))
    a12 = -0.5 * su2 * dt * dt
    a22 = su2 * dt
    if u.shape[0] > 4:
        a22 += u[4]  # a bias step allowed at this step (variance, rad^2/s^2)
    for i in range(3):
        qd[i, i] = a11
        qd[i, 3 + i] = a12
        qd[3 + i, i] = a12
        qd[3 + i, 3 + i] = a22
    dbn = db.copy()
    if n == 9:
        e = np.exp(-dt / prm[P_TAUF])
        sf2 = prm[P_SIGF] * prm[P_SIGF]
        for i in range(3):
            phi[6 + i, 6 + i] = e
            qd[6 + i, 6 + i] = sf2 * (1.0 - e * e)
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
def propagate_dynamics(q, w, db, u, b0, b1, dt, prm, n, phi, qd):
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
    for i in range(n):
        for j in range(n):
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
    dbn = db.copy()
    if n == 9:
        e = np.exp(-dt / prm[P_TAUF])
        sf2 = prm[P_SIGF] * prm[P_SIGF]
        for i in range(3):
            phi[6 + i, 6 + i] = e
            qd[6 + i, 6 + i] = sf2 * (1.0 - e * e)
            dbn[i] = e * db[i]
    return qn, wn, dbn


@njit(cache=True)
def _propagate(mode, k, q, v, db, t, u, r, prm, n, phi, qd):
    dt = t[k + 1] - t[k]
    if mode == MODE_GYRO:
        return propagate_gyro(q, v, db, u[k], dt, prm, n, phi, qd)
    return propagate_dynamics(q, v, db, u[k], r[k], r[k + 1], dt, prm, n, phi, qd)


# ------------------------------------------------------------------------------ vector update
@njit(cache=True)
def vector_update(q, v, db, p, z, b_ref, prm, n, innov):
    """Update with one body-frame field measurement z (nT) against the GCRF reference b_ref (nT).

    ``h(x) = A(q) (b_ref + db)``, ``H = [[h x], 0, A]`` (the last block only when n = 9), R = sig_m^2 I
    (n = 9) or (sig_m^2 + sig_f^2) I (n = 6). Joseph-form covariance update; P is updated in place.
    Returns (q, v, db, nis); ``innov`` (3,) receives z - h(x).
    """
    a = attitude_matrix(q)
    bref = np.empty(3)
    for i in range(3):
        bref[i] = b_ref[i] + (db[i] if n == 9 else 0.0)
    hb = np.empty(3)
    for i in range(3):
        hb[i] = a[i, 0] * bref[0] + a[i, 1] * bref[1] + a[i, 2] * bref[2]
    h = np.zeros((3, n))
    _skew_into(hb, h, 0, 0, 1.0)
    if n == 9:
        for i in range(3):
            for j in range(3):
                h[i, 6 + j] = a[i, j]
    r = prm[P_SIGM] * prm[P_SIGM]
    if n == 6:
        r += prm[P_SIGF] * prm[P_SIGF]
    for i in range(3):
        innov[i] = z[i] - hb[i]
    # P H^T (n x 3), S = H P H^T + R (3 x 3)
    pht = np.zeros((n, 3))
    for i in range(n):
        for c in range(3):
            s = 0.0
            for m in range(n):
                hv = h[c, m]
                if hv != 0.0:
                    s += p[i, m] * hv
            pht[i, c] = s
    sm = np.empty((3, 3))
    for i in range(3):
        for c in range(3):
            s = 0.0
            for m in range(n):
                hv = h[i, m]
                if hv != 0.0:
                    s += hv * pht[m, c]
            sm[i, c] = s
        sm[i, i] += r
    # 3x3 inverse by cofactors
    c00 = sm[1, 1] * sm[2, 2] - sm[1, 2] * sm[2, 1]
    c01 = sm[0, 2] * sm[2, 1] - sm[0, 1] * sm[2, 2]
    c02 = sm[0, 1] * sm[1, 2] - sm[0, 2] * sm[1, 1]
    det = sm[0, 0] * c00 + sm[1, 0] * c01 + sm[2, 0] * c02
    si = np.empty((3, 3))
    si[0, 0] = c00 / det
    si[0, 1] = c01 / det
    si[0, 2] = c02 / det
    si[1, 0] = (sm[1, 2] * sm[2, 0] - sm[1, 0] * sm[2, 2]) / det
    si[1, 1] = (sm[0, 0] * sm[2, 2] - sm[0, 2] * sm[2, 0]) / det
    si[1, 2] = (sm[0, 2] * sm[1, 0] - sm[0, 0] * sm[1, 2]) / det
    si[2, 0] = (sm[1, 0] * sm[2, 1] - sm[1, 1] * sm[2, 0]) / det
    si[2, 1] = (sm[0, 1] * sm[2, 0] - sm[0, 0] * sm[2, 1]) / det
    si[2, 2] = (sm[0, 0] * sm[1, 1] - sm[0, 1] * sm[1, 0]) / det
    kg = np.zeros((n, 3))
    for i in range(n):
        for c in range(3):
            kg[i, c] = pht[i, 0] * si[0, c] + pht[i, 1] * si[1, c] + pht[i, 2] * si[2, c]
    dx = np.zeros(n)
    for i in range(n):
        dx[i] = kg[i, 0] * innov[0] + kg[i, 1] * innov[1] + kg[i, 2] * innov[2]
    nis = 0.0
    for i in range(3):
        for c in range(3):
            nis += innov[i] * si[i, c] * innov[c]
    # Joseph form: (I - K H) P (I - K H)^T + K R K^T
    ikh = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            ikh[i, j] = (1.0 if i == j else 0.0) - (kg[i, 0] * h[0, j] + kg[i, 1] * h[1, j]
                                                    + kg[i, 2] * h[2, j])
    tmp = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            s = 0.0
            for m in range(n):
                s += ikh[i, m] * p[m, j]
            tmp[i, j] = s
    for i in range(n):
        for j in range(i, n):
            s = r * (kg[i, 0] * kg[j, 0] + kg[i, 1] * kg[j, 1] + kg[i, 2] * kg[j, 2])
            for m in range(n):
                s += tmp[i, m] * ikh[j, m]
            p[i, j] = s
            p[j, i] = s
    qn = qnormalize(qmul(quat_from_rotvec(-dx[0], -dx[1], -dx[2]), q))
    vn = np.empty(3)
    dbn = db.copy()
    for i in range(3):
        vn[i] = v[i] + dx[3 + i]
        if n == 9:
            dbn[i] += dx[6 + i]
    return qn, vn, dbn, nis


# --------------------------------------------------------------------------------- the passes
@njit(cache=True)
def forward_pass(mode, t, u, is_mag, z, r, prm, n, q0, v0, db0, p0,
                 q_out, v_out, db_out, p_out, nis_out, innov_out):
    """Forward MEKF over K steps. Step k sits at t[k]; propagation k-1 -> k uses u[k-1].

    Outputs (filled): q_out (K, 4), v_out (K, 3), db_out (K, 3), p_out (K, n, n) after the update at
    each step; nis_out (K,) NaN where no update; innov_out (K, 3).
    Returns the number of updates skipped because the innovation covariance was not invertible.
    """
    kk = t.shape[0]
    q = q0.copy()
    v = v0.copy()
    db = db0.copy()
    p = p0.copy()
    phi = np.zeros((n, n))
    qd = np.zeros((n, n))
    tmp = np.zeros((n, n))
    pm = np.zeros((n, n))
    innov = np.zeros(3)
    for k in range(kk):
        if k > 0:
            q, v, db = _propagate(mode, k - 1, q, v, db, t, u, r, prm, n, phi, qd)
            _sym_prop(phi, p, qd, n, tmp, pm)
            p[:, :] = pm
        nis_out[k] = np.nan
        innov_out[k, :] = np.nan
        if is_mag[k]:
            q, v, db, nis = vector_update(q, v, db, p, z[k], r[k], prm, n, innov)
            nis_out[k] = nis
            innov_out[k, :] = innov
        q_out[k, :] = q
        v_out[k, :] = v
        db_out[k, :] = db
        p_out[k, :, :] = p
    return 0


@njit(cache=True)
def smoother_pass(mode, t, u, r, prm, n, q_f, v_f, db_f, p_f, out_idx,
                  q_s, v_s, db_s, p_s6, p_sfull):
    """Rauch-Tung-Striebel smoother in error-state form over the stored forward pass.

    ``Ks = P+_k Phi^T (P-_{k+1})^-1``; ``dx_k = Ks (x_s,k+1 [-] x-_{k+1})`` with the attitude part
    the small rotation from the predicted to the smoothed quaternion; ``P_s,k = P+_k - Ks (P-_{k+1} -
    P_s,k+1) Ks^T`` (Crassidis & Junkins 2012 ex. 5.1). The correction is applied multiplicatively
    to the forward quaternion. q_s, v_s, db_s (K, .) are filled for every step; p_s6 (M, 6, 6)
    receives the attitude/rate block at steps with out_idx[k] >= 0 (its row). When p_sfull has K
    rows the full smoothed covariance is stored too.
    Returns the number of steps where P- was not positive definite (smoother gain set to zero).
    """
    kk = t.shape[0]
    phi = np.zeros((n, n))
    qd = np.zeros((n, n))
    tmp = np.zeros((n, n))
    pm = np.zeros((n, n))
    ps = p_f[kk - 1].copy()
    lwork = np.zeros((n, n))
    x = np.zeros((n, n))
    dx1 = np.zeros(n)
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
        pk = p_f[k]
        qm, vm, dbm = _propagate(mode, k, q_f[k], v_f[k], db_f[k], t, u, r, prm, n, phi, qd)
        _sym_prop(phi, pk, qd, n, tmp, pm)
        # error of the smoothed state at k+1 relative to the prediction
        qc = qm.copy()
        qc[0:3] = -qc[0:3]
        rv = rotvec_from_quat(qmul(q_s[k + 1], qc))
        for i in range(3):
            dx1[i] = -rv[i]
            dx1[3 + i] = v_s[k + 1, i] - vm[i]
        if n == 9:
            for i in range(3):
                dx1[6 + i] = db_s[k + 1, i] - dbm[i]
        # Ks^T = (P-)^-1 Phi P+  (P symmetric)
        for i in range(n):
            for j in range(n):
                s = 0.0
                for m in range(n):
                    f = phi[i, m]
                    if f != 0.0:
                        s += f * pk[m, j]
                tmp[i, j] = s
        ok = _cholesky_solve(pm, tmp, n, n, lwork, x)
        if not ok:
            bad += 1
            for i in range(n):
                for j in range(n):
                    x[i, j] = 0.0
        # dx_k = Ks dx1 = x^T dx1
        dxk = np.zeros(n)
        for i in range(n):
            s = 0.0
            for m in range(n):
                s += x[m, i] * dx1[m]
            dxk[i] = s
        q_s[k, :] = qnormalize(qmul(quat_from_rotvec(-dxk[0], -dxk[1], -dxk[2]), q_f[k]))
        for i in range(3):
            v_s[k, i] = v_f[k, i] + dxk[3 + i]
            db_s[k, i] = db_f[k, i] + (dxk[6 + i] if n == 9 else 0.0)
        # P_s,k = P+ - Ks (P- - P_s,k+1) Ks^T
        for i in range(n):
            for j in range(n):
                pm[i, j] -= ps[i, j]
        # tmp = Ks D = x^T D
        for i in range(n):
            for j in range(n):
                s = 0.0
                for m in range(n):
                    s += x[m, i] * pm[m, j]
                tmp[i, j] = s
        for i in range(n):
            for j in range(i, n):
                s = 0.0
                for m in range(n):
                    s += tmp[i, m] * x[m, j]
                val = pk[i, j] - s
                ps[i, j] = val
                ps[j, i] = val
        if out_idx[k] >= 0:
            p_s6[out_idx[k], :, :] = ps[0:6, 0:6]
        if store_full:
            p_sfull[k, :, :] = ps
    return bad


# ------------------------------------------------------------------------ helpers for set-up
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
