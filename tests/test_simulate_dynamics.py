"""Rigid-body dynamics and torques of the scenario simulator."""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from recon.core import MU_EARTH_m3_s2
from recon.simulate import simulate_pass
from recon.simulate.dynamics import (
    gravity_gradient_torque_Nm,
    inertial_momentum_Nms,
    kinetic_energy_J,
    magnetic_torque_Nm,
    propagate,
)

# An invented 3U-class inertia with products of inertia, kg m^2
J_SAT = np.array([[0.021, 0.0004, 0.0], [0.0004, 0.023, 0.0002], [0.0, 0.0002, 0.0071]])
ORBIT_S = 5700.0  # about one orbit at 510 km (period 2 pi sqrt(a^3/mu) = 94.8 min)


def test_constant_rate_matches_rotation_exponential():
    """With isotropic inertia and no torque w is constant and A(t) = exp(-[w x] t) A(0), i.e. the
    body turns by +w t: the kinematics sign pinned against scipy's rotation vectors."""
    q0 = Rotation.from_euler("xyz", [10, 20, 30], degrees=True)
    w = np.array([0.05, -0.02, 0.07])
    t = np.linspace(0.0, 100.0, 11)
    q, w_out = propagate(q0.as_quat(), w, 0.02 * np.eye(3), t)
    expected = Rotation.from_rotvec(-np.outer(t, w)) * q0
    angle_err_rad = (Rotation.from_quat(q) * expected.inv()).magnitude()
    two_rk4_roundoffs = 1e-12  # RK4 at 0.02 s on a 0.09 rad/s rotation: error ~1e-16 per step
    assert angle_err_rad.max() < two_rk4_roundoffs
    np.testing.assert_allclose(w_out, np.tile(w, (len(t), 1)), rtol=0, atol=1e-15)


def test_torque_free_motion_conserves_inertial_momentum_and_energy_over_one_orbit():
    """Without torque, h_gcrf = A^T J w and T = w.Jw/2 are constants of the motion (Euler)."""
    q0 = Rotation.from_euler("zyx", [40, -25, 70], degrees=True).as_quat()
    w0 = np.radians([3.0, -2.0, 5.0])  # an asymmetric tumble with all axes excited
    t = np.arange(0.0, ORBIT_S + 1e-9, 10.0)
    q, w = propagate(q0, w0, J_SAT, t)
    h = inertial_momentum_Nms(q, w, J_SAT)
    T = kinetic_energy_J(w, J_SAT)
    rel_h = np.linalg.norm(h - h[0], axis=1).max() / np.linalg.norm(h[0])
    rel_T = np.abs(T - T[0]).max() / T[0]
    assert rel_h < 1e-9  # the required conservation
    assert rel_T < 1e-9
    # the motion is not trivial: the body rate changes direction by tens of degrees
    assert np.linalg.norm(w - w0, axis=1).max() > 0.1 * np.linalg.norm(w0)


def test_magnetic_torque_parallel_and_perpendicular_cases():
    """tau = m x B with m = N I A (Griffiths, Introduction to Electrodynamics, 4th ed., sec. 6.1):
    zero for m parallel to B, |m||B| for m perpendicular.

    Numeric example (hand computed): a coil of N = 200 turns of area A = 50 cm^2 carrying 0.1 A has
    m = 200 * 0.1 A * 0.005 m^2 = 0.1 A m^2; in B = 30 000 nT = 3e-5 T across it the torque is
    0.1 * 3e-5 = 3e-6 N m, along x cross y = +z.
    """
    m_Am2 = 200 * 0.1 * 0.005
    assert m_Am2 == pytest.approx(0.1, rel=1e-15)
    tau = magnetic_torque_Nm(np.array([m_Am2, 0.0, 0.0]), np.array([0.0, 30_000.0, 0.0]))
    np.testing.assert_allclose(tau, [0.0, 0.0, 3.0e-6], rtol=1e-12, atol=0)
    b = np.array([12_000.0, -25_000.0, 31_000.0])
    parallel = magnetic_torque_Nm(0.2 * b / np.linalg.norm(b), b)
    np.testing.assert_allclose(parallel, 0.0, atol=1e-20)
    perp = np.cross(b, [1.0, 0.0, 0.0])
    perp = 0.2 * perp / np.linalg.norm(perp)
    assert np.linalg.norm(magnetic_torque_Nm(perp, b)) == pytest.approx(0.2 * np.linalg.norm(b) * 1e-9, rel=1e-12)


def test_gravity_gradient_torque_hand_example():
    """3 mu/|r|^3 (r_hat x J r_hat): zero along a principal axis; for J = diag(1, 2, 3) kg m^2 and
    r_hat = (1, 1, 0)/sqrt(2), r_hat x J r_hat = (0, 0, 1/2), so tau_z = 1.5 mu/|r|^3 (hand
    derivation from the textbook formula, e.g. Markley & Crassidis 2014 ch. 3)."""
    J = np.diag([1.0, 2.0, 3.0])
    r_km = 7000.0
    along = gravity_gradient_torque_Nm(np.array([0.0, r_km, 0.0]), J)
    np.testing.assert_allclose(along, 0.0, atol=1e-22)
    tau = gravity_gradient_torque_Nm(r_km * np.array([1.0, 1.0, 0.0]) / np.sqrt(2.0), J)
    expected_z = 1.5 * MU_EARTH_m3_s2 / (r_km * 1e3) ** 3
    np.testing.assert_allclose(tau, [0.0, 0.0, expected_z], rtol=1e-12, atol=1e-22)


def test_compiled_torques_match_numpy_forms():
    """One integration step's rate change agrees with J^-1 (m x B + tau_gg - w x Jw) dt."""
    sim = simulate_pass("quiet", seed=5, duration_s=30.0, disturbance_sigma_Nm=0.0)
    env = sim.environment
    q0 = sim.q_body_from_gcrf[0]
    w0 = np.array([0.01, -0.02, 0.015])
    m = np.array([[0.05, -0.1, 0.08]])
    dt = 1e-3
    t = np.array([0.0, dt])
    _, w = propagate(q0, w0, J_SAT, t, m, None, env, gravity_gradient=True, max_step_s=dt)
    b_gcrf, r_gcrf = env.interpolate(np.array([0.0]))
    rot = Rotation.from_quat(q0)
    tau = magnetic_torque_Nm(m[0], rot.apply(b_gcrf[0])) + gravity_gradient_torque_Nm(rot.apply(r_gcrf[0]), J_SAT)
    wdot = np.linalg.solve(J_SAT, tau - np.cross(w0, J_SAT @ w0))
    # first-order check: the difference is the O(dt^2) change of the torques over one step
    np.testing.assert_allclose((w[1] - w0) / dt, wdot, rtol=1e-3, atol=1e-9)


def test_ideal_bdot_never_raises_kinetic_energy():
    """Under B-dot with no noise, no disturbance, no gravity gradient and no crosstalk, the torque
    m x B with m = -k dB/dt takes energy out: w . tau = -k |B x w|^2 <= 0 (Stickler & Alfriend
    1974). Checked step by step at every magnetometer instant (0.1 s)."""
    sim = simulate_pass("nominal", seed=2, duration_s=600.0, mag_noise_nT=0.0, mag_lsb_nT=0.0,
                        disturbance_sigma_Nm=0.0, gravity_gradient=False, mag_sampling="coils_off")
    T = kinetic_energy_J(sim.w_body_rad_s, sim.inertia_kg_m2)
    rises = np.diff(T)
    integration_noise_J = 1e-12 * T[0]  # RK4 + double rounding; measured rises are ~3e-16 T0
    assert rises.max() <= integration_noise_J
    assert T[-1] < 0.5 * T[0]  # and it does detumble (measured: 0.07 T0 after 600 s)
