"""The compiled filter core against independent references: scipy rotations, scipy's expm, finite
differences, filterpy's ExtendedKalmanFilter and rts_smoother, and Wahba's problem with a known answer."""

from __future__ import annotations

import numpy as np
import pytest
from filterpy.kalman import ExtendedKalmanFilter, KalmanFilter
from scipy.linalg import expm
from scipy.spatial.transform import Rotation

from recon.core import scipy_from_shuster_quaternion
from recon.estimate import NoiseModel
from recon.estimate import kernels as core
from recon.estimate.initial import davenport_q_method
from recon.estimate.run import filter_params

INERTIA = np.array([[0.021, 0.0004, 0.0], [0.0004, 0.023, 0.0002], [0.0, 0.0002, 0.0071]])
# float64 round-off after a few hundred operations on numbers of order 1: agreement "to 1e-12"
ROUNDOFF = 1e-12


def _skew(v):
    return np.array([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])


def test_quaternion_helpers_follow_scipy():
    rng = np.random.default_rng(0)
    for _ in range(20):
        p, q = Rotation.random(random_state=rng), Rotation.random(random_state=rng)
        prod = core.qmul(p.as_quat(), q.as_quat())
        ref = (p * q).as_quat()
        assert min(np.abs(prod - ref).max(), np.abs(prod + ref).max()) < ROUNDOFF
        v = rng.normal(size=3)
        assert np.abs(core.quat_from_rotvec(*v) - Rotation.from_rotvec(v).as_quat()).max() < ROUNDOFF
        assert np.abs(core.attitude_matrix(p.as_quat()) - p.as_matrix()).max() < ROUNDOFF
        r = Rotation.from_rotvec(v * 0.5)
        assert np.abs(core.rotvec_from_quat(r.as_quat()) - r.as_rotvec()).max() < 1e-10


def test_propagation_matches_kinematics_dA_dt():
    """One gyro step applies exp(-[w x] dt) to the attitude matrix (dA/dt = -[w x] A)."""
    q = Rotation.random(random_state=3).as_quat()
    w = np.deg2rad([3.0, -1.0, 2.0])
    dt = 0.7
    phi, qd = np.zeros((9, 9)), np.zeros((9, 9))
    qn, _, _ = core.propagate_gyro(q, np.zeros(3), np.zeros(3), np.r_[w, 0.0, 0.0], dt,
                                   filter_params(NoiseModel(mag_nT=1.0, gyro_arw_rad_sqrt_s=1e-5), 0.05, None), phi, qd)
    expected = expm(-_skew(w) * dt) @ Rotation.from_quat(q).as_matrix()
    assert np.abs(Rotation.from_quat(qn).as_matrix() - expected).max() < ROUNDOFF


@pytest.mark.parametrize("rate", [0.05, 1e-7])  # closed form and its Taylor branch
def test_gyro_transition_equals_matrix_exponential(rate):
    """Phi = expm(F dt) with F = [[-[w x], -I], [0, 0]] (Markley & Crassidis 2014 ch. 6)."""
    w = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8]) * rate
    dt = 0.9
    phi = np.zeros((6, 6))
    core.gyro_transition(w, dt, phi)
    f = np.zeros((6, 6))
    f[:3, :3] = -_skew(w)
    f[:3, 3:] = -np.eye(3)
    assert np.abs(phi[:3] - expm(f * dt)[:3]).max() < ROUNDOFF


def test_gyro_process_noise_is_crassidis_junkins_form():
    """Q = [[(sv^2 dt + su^2 dt^3/3) I, -(su^2 dt^2/2) I], [., su^2 dt I]] (Crassidis & Junkins 2012,
    ch. 7) with the book's example values sv = sqrt(10)*1e-7 rad/s^(1/2), su = sqrt(10)*1e-10
    rad/s^(3/2), dt = 1 s; no gap (the sample is fresh) and no unmodelled acceleration."""
    sv, su, dt = np.sqrt(10) * 1e-7, np.sqrt(10) * 1e-10, 1.0
    nm = NoiseModel(mag_nT=1.0, gyro_arw_rad_sqrt_s=sv, gyro_bias_walk_rad_s_sqrt_s=su, rate_hold_accel_rad_s2=0.0,
                    field_model_tau_s=0.0)
    prm = filter_params(nm, dt, None)
    phi, qd = np.zeros((9, 9)), np.zeros((9, 9))
    core.propagate_gyro(Rotation.identity().as_quat(), np.zeros(3), np.zeros(3), np.r_[0.0, 0.0, 0.0, 0.0, 0.0],
                        dt, prm, phi, qd)
    qd = qd[:6, :6]
    expected = np.block([[(sv ** 2 * dt + su ** 2 * dt ** 3 / 3) * np.eye(3), -(su ** 2 * dt ** 2 / 2) * np.eye(3)],
                         [-(su ** 2 * dt ** 2 / 2) * np.eye(3), su ** 2 * dt * np.eye(3)]])
    assert np.abs(qd - expected).max() < 1e-12 * np.abs(expected).max()


def test_gap_grows_attitude_noise_like_a_held_sample():
    """Holding a sample of white-noise variance sv^2/h for s seconds gives attitude variance sv^2 s^2/h."""
    sv, h = 1e-4, 0.05
    nm = NoiseModel(mag_nT=1.0, gyro_arw_rad_sqrt_s=sv, gyro_bias_walk_rad_s_sqrt_s=0.0, rate_hold_accel_rad_s2=0.0)
    prm = filter_params(nm, h, None)
    total = 0.0
    s = 0.0
    for dt in (0.05, 0.3, 1.0, 3.65):  # four steps through a 5 s gap
        phi, qd = np.zeros((9, 9)), np.zeros((9, 9))
        core.propagate_gyro(Rotation.identity().as_quat(), np.zeros(3), np.zeros(3), np.r_[0, 0, 0, s, 0.0], dt, prm,
                            phi, qd)
        total += qd[0, 0]
        s += dt
    assert abs(total - sv ** 2 * s ** 2 / h) < 1e-12 * total


def test_dynamics_jacobian_matches_finite_differences():
    """Phi of the dynamics mode against central differences of the RK4 step it linearises."""
    prm = filter_params(NoiseModel(mag_nT=100.0), 0.0, INERTIA)
    q = Rotation.random(random_state=3).as_quat()
    w = np.deg2rad([1.0, -2.0, 0.5])
    u = np.r_[0.1, -0.15, 0.08, 6888.0, 100.0, 50.0, 6888.0, 120.0, 55.0]
    b0 = np.array([20000.0, -15000.0, 30000.0])
    dt = 0.1
    phi, qd = np.zeros((9, 9)), np.zeros((9, 9))
    qn, wn, _ = core.propagate_dynamics(q, w, np.zeros(3), u, b0, b0 + 5.0, dt, prm, phi, qd)
    phi = phi[:6, :6]
    num = np.zeros((6, 6))
    eps = 1e-7
    for i in range(6):
        cols = []
        for sgn in (1.0, -1.0):
            dx = np.zeros(6)
            dx[i] = sgn * eps
            qp = (Rotation.from_rotvec(-dx[:3]) * Rotation.from_quat(q)).as_quat()
            q2, w2, _ = core.propagate_dynamics(qp, w + dx[3:], np.zeros(3), u, b0, b0 + 5.0, dt, prm,
                                                np.zeros((9, 9)), np.zeros((9, 9)))
            dth = -(Rotation.from_quat(q2) * Rotation.from_quat(qn).inv()).as_rotvec()
            cols.append(np.r_[dth, w2 - wn])
        num[:, i] = (cols[0] - cols[1]) / (2 * eps)
    # Phi = I + F dt + F^2 dt^2/2 with F averaged over the step: error of third order in dt, about
    # 2e-7 here (it falls eightfold when dt halves); central differences carry about 1e-8
    assert np.abs(num - phi).max() < 1e-6


@pytest.mark.parametrize("n", [6, 9])
def test_one_step_agrees_with_filterpy_ekf(n):
    """Propagation with the gyro and one magnetometer update equal filterpy's ExtendedKalmanFilter
    doing the same linearised step (predict with F and Q, update with HJacobian/Hx), to 1e-12.

    n = 9: field-model error as a Gauss-Markov state. n = 6: recon's 9-state filter with a white
    field-model error (tau_f = 0) against filterpy's 6-state filter with that error's variance in R,
    which is the same filter (the white state decays to zero at every step)."""
    rng = np.random.default_rng(7)
    nm = NoiseModel(mag_nT=80.0, gyro_arw_rad_sqrt_s=np.deg2rad(0.004), field_model_tau_s=300.0 if n == 9 else 0.0)
    prm = filter_params(nm, 0.05, None)
    q0 = Rotation.random(random_state=rng).as_quat()
    beta0 = np.deg2rad([0.1, -0.2, 0.05])
    db0 = np.array([30.0, -20.0, 10.0]) if n == 9 else np.zeros(3)
    a = rng.normal(size=(9, 9)) * 1e-3
    p0 = a @ a.T + np.eye(9) * 1e-6
    p0[6:, 6:] += np.eye(3) * 3000.0
    if n == 6:
        p0[:6, 6:] = p0[6:, :6] = 0.0
    u = np.r_[np.deg2rad([2.0, -1.0, 0.5]), 0.02, 0.0]
    dt = 0.1
    b_ref = np.array([21000.0, -9000.0, 33000.0])
    z = Rotation.from_quat(q0).apply(b_ref) + rng.normal(size=3) * 100.0
    # recon
    phi, qd = np.zeros((9, 9)), np.zeros((9, 9))
    qm, bm, dbm = core.propagate_gyro(q0, beta0, db0, u, dt, prm, phi, qd)
    p = phi @ p0 @ phi.T + qd
    innov = np.zeros(3)
    qp, bp, dbp, nis = core.vector_update(qm, bm, dbm, p, z, b_ref, prm, innov)
    # filterpy, on the error state about the prediction
    am = Rotation.from_quat(qm).as_matrix()
    bref = b_ref + dbm
    h = np.zeros((3, n))
    h[:, :3] = _skew(am @ bref)
    if n == 9:
        h[:, 6:] = am
    ekf = ExtendedKalmanFilter(dim_x=n, dim_z=3)
    ekf.x = np.zeros((n, 1))
    ekf.P = p0[:n, :n].copy()
    ekf.F = phi[:n, :n].copy()
    ekf.Q = qd[:n, :n].copy()
    ekf.R = np.eye(3) * (prm[core.P_SIGM] ** 2 + (prm[core.P_SIGF] ** 2 if n == 6 else 0.0))
    ekf.predict()
    ekf.update(z.reshape(3, 1), HJacobian=lambda x: h, Hx=lambda x: (am @ bref).reshape(3, 1))
    dx = ekf.x.ravel()
    q_ref = (Rotation.from_rotvec(-dx[:3]) * Rotation.from_quat(qm)).as_quat()
    assert np.abs(p[:n, :n] - ekf.P).max() < ROUNDOFF * np.abs(p).max()
    assert min(np.abs(qp - q_ref).max(), np.abs(qp + q_ref).max()) < ROUNDOFF
    assert np.abs(bp - (beta0 + dx[3:6])).max() < ROUNDOFF
    if n == 9:
        assert np.abs(dbp - (dbm + dx[6:])).max() < ROUNDOFF * 1e3  # nT of order 1e2
    y = ekf.y.ravel()
    assert abs(nis - y @ np.linalg.solve(ekf.S, y)) < ROUNDOFF * nis


def test_forward_pass_equals_the_reference_step_functions():
    """The pass (block-structured prediction, no allocation) equals a loop of the reference step
    functions (full Phi and Q) over a stretch with a gyro gap and skipped updates."""
    rng = np.random.default_rng(3)
    prm = filter_params(NoiseModel(mag_nT=100.0, gyro_arw_rad_sqrt_s=np.deg2rad(0.004), rate_hold_accel_rad_s2=1e-3),
                  0.05, None)
    kk = 80
    t = np.cumsum(np.r_[0.0, np.full(kk - 1, 0.05)])
    t[40:] += 3.0  # a 3 s gap before step 40
    u = np.zeros((kk, 5))
    u[:, :3] = np.deg2rad([2.0, -1.0, 0.7]) + rng.normal(size=(kk, 3)) * 1e-3
    u[40 - 1, 4] = 1e-6
    is_mag = rng.random(kk) < 0.7
    r = np.tile([21000.0, -9000.0, 33000.0], (kk, 1))
    z = rng.normal(size=(kk, 3)) * 100 + Rotation.random(random_state=4).apply(r)
    q0 = Rotation.random(random_state=4).as_quat()
    p0 = np.diag(np.r_[np.full(3, 1e-3), np.full(3, 1e-6), np.full(3, 3000.0)])
    out = [np.empty((kk, 4)), np.empty((kk, 3)), np.empty((kk, 3)), np.empty((kk, core.NP)), np.empty(kk),
           np.empty((kk, 3))]
    core.forward_pass(0, t, u, is_mag, z, r, prm, q0, np.zeros(3), np.zeros(3), p0, *out)
    out[3] = core.unpack_covariance(out[3])
    q, v, db, p = q0.copy(), np.zeros(3), np.zeros(3), p0.copy()
    for k in range(kk):
        if k > 0:
            phi, qd = np.zeros((9, 9)), np.zeros((9, 9))
            q, v, db = core.propagate_gyro(q, v, db, u[k - 1], t[k] - t[k - 1], prm, phi, qd)
            p = phi @ p @ phi.T + qd
        if is_mag[k]:
            q, v, db, nis = core.vector_update(q, v, db, p, z[k], r[k], prm, np.zeros(3))
            assert abs(out[4][k] - nis) < 1e-9 * nis
        else:
            assert np.isnan(out[4][k])
        assert np.abs(out[0][k] - q).max() < ROUNDOFF
        assert np.abs(out[3][k] - p).max() < ROUNDOFF * np.abs(p).max()


def test_smoother_covariance_equals_filterpy_rts():
    """The smoothed covariance recursion equals filterpy's KalmanFilter.rts_smoother fed with the same
    forward covariances, transitions and process noise (the covariance part of the RTS recursion does
    not depend on the states, so the two must agree to round-off)."""
    rng = np.random.default_rng(11)
    nm = NoiseModel(mag_nT=100.0, gyro_arw_rad_sqrt_s=np.deg2rad(0.004))
    prm = filter_params(nm, 0.1, None)
    n, kk = core.N, 60
    t = np.arange(kk) * 0.1
    u = np.zeros((kk, 5))
    u[:, :3] = np.deg2rad([2.0, 1.0, -1.5]) + rng.normal(size=(kk, 3)) * 1e-3
    is_mag = np.ones(kk, bool)
    q_true = Rotation.from_rotvec(np.outer(t, -np.deg2rad([2.0, 1.0, -1.5]))) * Rotation.random(random_state=1)
    r = np.tile([20000.0, 5000.0, 30000.0], (kk, 1)) + np.outer(t, [300.0, -200.0, 100.0])
    z = q_true.apply(r) + rng.normal(size=(kk, 3)) * 100
    p0 = np.diag(np.r_[np.full(3, 1e-4), np.full(3, 1e-6), np.full(3, prm[core.P_SIGF] ** 2)])
    qf, vf, dbf = np.empty((kk, 4)), np.empty((kk, 3)), np.empty((kk, 3))
    pf, nis, inn = np.empty((kk, core.NP)), np.empty(kk), np.empty((kk, 3))
    core.forward_pass(0, t, u, is_mag, z, r, prm, q_true[0].as_quat(), np.zeros(3), np.zeros(3), p0,
                      qf, vf, dbf, pf, nis, inn)
    qs, vs, dbs = np.empty((kk, 4)), np.empty((kk, 3)), np.empty((kk, 3))
    ps6 = np.empty((kk, 6, 6))
    psf = np.empty((kk, n, n))
    bad = core.smoother_pass(0, t, u, r, prm, qf, vf, dbf, pf, np.arange(kk), qs, vs, dbs, ps6, psf)
    assert bad == 0
    pf = core.unpack_covariance(pf)
    fs, qs_ = np.empty((kk, n, n)), np.empty((kk, n, n))
    for k in range(kk - 1):
        phi, qd = np.zeros((n, n)), np.zeros((n, n))
        core.propagate_gyro(qf[k], vf[k], dbf[k], u[k], t[k + 1] - t[k], prm, phi, qd)
        fs[k + 1], qs_[k + 1] = phi, qd  # filterpy predicts step k with Fs[k+1], Qs[k+1]
    fs[0], qs_[0] = np.eye(n), np.zeros((n, n))
    kf = KalmanFilter(dim_x=n, dim_z=3)
    _, p_ref, _, _ = kf.rts_smoother(np.zeros((kk, n, 1)), pf.copy(), Fs=fs, Qs=qs_)
    assert np.abs(psf - p_ref).max() < 1e-9 * np.abs(p_ref).max()
    assert np.abs(ps6 - p_ref[:, :6, :6]).max() < 1e-9 * np.abs(p_ref).max()


def test_shuster_convention_conversion_matches_the_formula():
    """Shuster/CCSDS attitude matrix (CCSDS 504.0-B-2 annex F2) equals scipy's for the converted quaternion."""
    rng = np.random.default_rng(5)
    for _ in range(10):
        q1, q2, q3, qc = Rotation.random(random_state=rng).as_quat()
        m_ba = np.array([[q1 ** 2 - q2 ** 2 - q3 ** 2 + qc ** 2, 2 * (q1 * q2 + q3 * qc), 2 * (q1 * q3 - q2 * qc)],
                         [2 * (q1 * q2 - q3 * qc), -q1 ** 2 + q2 ** 2 - q3 ** 2 + qc ** 2, 2 * (q2 * q3 + q1 * qc)],
                         [2 * (q1 * q3 + q2 * qc), 2 * (q2 * q3 - q1 * qc), -q1 ** 2 - q2 ** 2 + q3 ** 2 + qc ** 2]])
        q_scipy = scipy_from_shuster_quaternion([q1, q2, q3, qc])
        assert np.abs(Rotation.from_quat(q_scipy).as_matrix() - m_ba).max() < ROUNDOFF


def test_davenport_recovers_a_known_attitude_and_its_covariance():
    """Noise-free vectors give the attitude exactly; with noise, errors follow the Wahba covariance
    [sum a_i (I - b_i b_i^T)]^-1 (Markley & Crassidis 2014 sec. 5.5): NEES averages 3."""
    rng = np.random.default_rng(2)
    truth = Rotation.random(random_state=rng)
    r = rng.normal(size=(5, 3))
    r /= np.linalg.norm(r, axis=1, keepdims=True)
    sol = davenport_q_method(truth.apply(r), r, 0.01)
    assert (Rotation.from_quat(sol.q_body_from_gcrf) * truth.inv()).magnitude() < 1e-10
    sig = 1e-3
    nees = []
    for _ in range(400):
        b = truth.apply(r)
        b = b + rng.normal(size=b.shape) * sig
        s = davenport_q_method(b, r, sig)
        e = -(truth * Rotation.from_quat(s.q_body_from_gcrf).inv()).as_rotvec()
        nees.append(e @ np.linalg.solve(s.covariance_rad2, e))
    # mean of 400 chi-square(3) draws: 3 +- 1.96 sqrt(6/400) = [2.76, 3.24] (95 %); isotropic 3-D noise
    # on unit vectors puts 2/3 of its variance across the vector, so the mean sits near 3 * 2/3 * 3/2 = 3
    assert 2.6 < np.mean(nees) < 3.4
