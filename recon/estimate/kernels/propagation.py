"""Propagation of the filter between measurements: state, transition matrix Phi and process noise Q,
for the gyro mode and the dynamics mode, and the covariance prediction the passes use.

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
  1968). A white field-model error (``tau_f = 0``) is the same filter with ``exp(-dt/tau_f) = 0``,
  which is exactly the six-state filter with ``sig_f^2`` added to the measurement noise.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Ch. 6.
Crassidis, J. L. and Junkins, J. L. (2012). Optimal Estimation of Dynamic Systems, 2nd ed. CRC.
Ch. 7 (gyro model and its discrete Q).
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Bryson, A. E. and Henrikson, L. J. (1968). Estimation using sampled data containing sequentially
correlated noise. J. Spacecraft and Rockets 5(6), 662-665 (memory).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .algebra import attitude_matrix, cross, qmul, qnormalize, rot_step_into, skew
from .layout import MODE_GYRO, P_ACC, P_HNOM, P_J, P_JINV, P_MU, P_SIGF, P_SIGTAU, P_SU, P_SV, P_TAUF, P_TAUREL, N


# ----------------------------------------------------------------------------- gyro propagation
@njit(cache=True, error_model="numpy")
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


@njit(cache=True, error_model="numpy")
def _field_decay(dt, prm):
    """Gauss-Markov factor e = exp(-dt/tau_f) and its process noise sig_f^2 (1 - e^2); e = 0 if tau_f <= 0."""
    tau = prm[P_TAUF]
    e = np.exp(-dt / tau) if tau > 0.0 else 0.0
    return e, prm[P_SIGF] * prm[P_SIGF] * (1.0 - e * e)


@njit(cache=True, error_model="numpy")
def _gyro_noise(dt, s0, extra, prm, rate_psd=0.0):
    """Discrete Q coefficients (a11, a12, a22) of one gyro step (see the module docstring).

    s0: time since the held gyro sample was taken, at the start of the step; extra: added bias
    variance (a bias step allowed at this step, rad^2/s^2); rate_psd: spectral density of the error of
    the rate used over the step beyond the gyro's own noise (rad^2/s, per axis: a clipped axis
    reconstructed from the magnetometer, whose error is correlated over seconds and counted as a
    density), which adds ``rate_psd dt`` of attitude variance.
    """
    sv2 = prm[P_SV] * prm[P_SV]
    su2 = prm[P_SU] * prm[P_SU]
    a11 = sv2 * dt + su2 * dt * dt * dt / 3.0 + rate_psd * dt
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


@njit(cache=True, error_model="numpy")
def propagate_gyro(q, beta, db, u, dt, prm, phi, qd):
    """One gyro-mode step, reference form: returns (q_next, beta_next, db_next) and fills the full
    Phi and Q (N x N). ``u = [w_meas (3), s0, extra]``: the held gyro sample (rad/s, body), the time
    since it was taken (s) and an extra bias variance for this step (rad^2/s^2, zero except where a
    bias jump was found) and, optionally, u[5] the spectral density of a reconstructed sample's rate
    error (rad^2/s). The passes use the same formulas through :func:`predict_into`.
    """
    w = np.empty(3)
    for i in range(3):
        w[i] = u[i] - beta[i]
    qn = np.empty(4)
    rot_step_into(-w[0] * dt, -w[1] * dt, -w[2] * dt, q, qn)
    phi[:, :] = 0.0
    qd[:, :] = 0.0
    gyro_transition(w, dt, phi)
    a11, a12, a22 = _gyro_noise(dt, u[3], u[4] if u.shape[0] > 4 else 0.0, prm, u[5] if u.shape[0] > 5 else 0.0)
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
@njit(cache=True, error_model="numpy")
def _torque(q, w, m_body, b_gcrf_nT, r_gcrf_km, prm):
    """Magnetic m x B plus gravity gradient, N m, body; also returns J w for reuse."""
    a = attitude_matrix(q)
    bb = a @ b_gcrf_nT * 1e-9
    tau = cross(m_body, bb)
    rn = np.sqrt(r_gcrf_km[0] ** 2 + r_gcrf_km[1] ** 2 + r_gcrf_km[2] ** 2)
    if rn > 0.0:
        nb = a @ r_gcrf_km / rn
        jn = np.empty(3)
        for i in range(3):
            jn[i] = prm[P_J + 3 * i] * nb[0] + prm[P_J + 3 * i + 1] * nb[1] + prm[P_J + 3 * i + 2] * nb[2]
        k = 3.0 * prm[P_MU] / (rn * 1e3) ** 3
        g = cross(nb, jn)
        for i in range(3):
            tau[i] += k * g[i]
    return tau


@njit(cache=True, error_model="numpy")
def _wdot(q, w, m_body, b, r, prm):
    tau = _torque(q, w, m_body, b, r, prm)
    jw = np.empty(3)
    for i in range(3):
        jw[i] = prm[P_J + 3 * i] * w[0] + prm[P_J + 3 * i + 1] * w[1] + prm[P_J + 3 * i + 2] * w[2]
    rhs = tau - cross(w, jw)
    out = np.empty(3)
    for i in range(3):
        out[i] = prm[P_JINV + 3 * i] * rhs[0] + prm[P_JINV + 3 * i + 1] * rhs[1] + prm[P_JINV + 3 * i + 2] * rhs[2]
    return out


@njit(cache=True, error_model="numpy")
def _qdot(q, w):
    """dq/dt = -1/2 (w, 0) (x) q (scalar-last Hamilton)."""
    hw = np.empty(4)
    hw[0] = -0.5 * w[0]
    hw[1] = -0.5 * w[1]
    hw[2] = -0.5 * w[2]
    hw[3] = 0.0
    return qmul(hw, q)


@njit(cache=True, error_model="numpy")
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


@njit(cache=True, error_model="numpy")
def dynamics_jacobian(q, w, m_body, b_gcrf_nT, r_gcrf_km, prm, f):
    """Fill f[0:6, 0:6] with the error-state Jacobian of the dynamics mode."""
    a = attitude_matrix(q)
    bb = a @ b_gcrf_nT * 1e-9
    sk_w = skew(w)
    jm = np.empty((3, 3))
    jinv = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            jm[i, j] = prm[P_J + 3 * i + j]
            jinv[i, j] = prm[P_JINV + 3 * i + j]
    # d tau / d dtheta: magnetic [m x][b x]; gravity gradient k (-[Jn x] + [n x] J) [n x]
    t_th = skew(m_body) @ skew(bb)
    rn = np.sqrt(r_gcrf_km[0] ** 2 + r_gcrf_km[1] ** 2 + r_gcrf_km[2] ** 2)
    if rn > 0.0:
        nb = a @ r_gcrf_km / rn
        k = 3.0 * prm[P_MU] / (rn * 1e3) ** 3
        t_th += k * ((-skew(jm @ nb) + skew(nb) @ jm) @ skew(nb))
    f_wth = jinv @ t_th
    f_ww = jinv @ (skew(jm @ w) - sk_w @ jm)
    for i in range(3):
        for j in range(3):
            f[i, j] = -sk_w[i, j]
            f[i, 3 + j] = 1.0 if i == j else 0.0
            f[3 + i, j] = f_wth[i, j]
            f[3 + i, 3 + j] = f_ww[i, j]


@njit(cache=True, error_model="numpy")
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
    tm = cross(m_body, a @ b0 * 1e-9)
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


@njit(cache=True, error_model="numpy")
def predict_into(mode, k, q, v, db, t, u, r, prm, p, qn, vn, dbn, m, pm, blk, w3, phi, qd):
    """Prediction k -> k+1 in place: state into (qn, vn, dbn), ``m = Phi P``, ``pm = Phi P Phi^T + Q``.

    Gyro mode uses the block structure ``Phi = [[A, B, 0], [0, I, 0], [0, 0, e I]]`` (blk = [A B],
    3 x 6); dynamics mode a dense attitude-rate block from :func:`propagate_dynamics`.
    """
    dt = t[k + 1] - t[k]
    if mode == MODE_GYRO:
        for i in range(3):
            w3[i] = u[k, i] - v[i]
            vn[i] = v[i]
        rot_step_into(-w3[0] * dt, -w3[1] * dt, -w3[2] * dt, q, qn)
        gyro_transition(w3, dt, blk)
        a11, a12, a22 = _gyro_noise(dt, u[k, 3], u[k, 4] if u.shape[1] > 4 else 0.0, prm,
                                    u[k, 5] if u.shape[1] > 5 else 0.0)
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

