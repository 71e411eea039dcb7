"""Sensor models of the scenario simulator: the gyro's noise statistics and the magnetometer model."""

import allantools
import numpy as np
import pytest

from recon.simulate.sensors import (
    GyroNoise,
    MagnetometerHardware,
    draw_magnetometer,
    gyro_bias_path,
    gyro_reading_rad_s,
    magnetometer_reading_nT,
)

DEG = np.pi / 180.0
M_MAG = np.array([[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])  # v_body = M v_sensor


def _gyro(sv, su, full_scale=100.0):
    return GyroNoise(np.eye(3), sv, su, np.array([1e-3, -2e-3, 5e-4]), full_scale)


def _sample_variance_tolerance(n):
    """Five standard errors of a Gaussian sample variance, relative: 5 sqrt(2 / n)."""
    return 5.0 * np.sqrt(2.0 / n)


def test_bias_walk_increments_have_variance_su2_dt():
    """Reynolds (2003) NASA CP-2003-212246: beta_{k+1} - beta_k = su sqrt(dt) N(0, 1)."""
    rng = np.random.default_rng(11)
    su, dt, n = 3.5e-6, 0.05, 100_000
    beta = gyro_bias_path(_gyro(7e-5, su), n, dt, rng.standard_normal((n, 3)))
    var = np.diff(beta, axis=0).var(axis=0, ddof=1)
    np.testing.assert_allclose(var, su ** 2 * dt, rtol=_sample_variance_tolerance(n))
    np.testing.assert_allclose(beta[0], [1e-3, -2e-3, 5e-4], rtol=0, atol=0)


def test_rate_noise_has_reynolds_variance():
    """Reynolds (2003): w_meas - w - (beta_k + beta_k+1)/2 has variance sv^2/dt + su^2 dt/12."""
    rng = np.random.default_rng(12)
    sv, su, dt, n = 7e-5, 3.5e-4, 0.05, 100_000  # su large enough that its dt/12 term shows (~0.1 %)
    g = _gyro(sv, su)
    beta = gyro_bias_path(g, n, dt, rng.standard_normal((n, 3)))
    w = np.column_stack([np.sin(np.arange(n) * 1e-3), np.zeros(n), np.full(n, 0.1)])
    out = gyro_reading_rad_s(g, w, beta, dt, rng.standard_normal((n, 3)))
    resid = out - w - 0.5 * (beta[1:] + beta[:-1])
    np.testing.assert_allclose(resid.var(axis=0, ddof=1), sv ** 2 / dt + su ** 2 * dt / 12.0,
                               rtol=_sample_variance_tolerance(n))
    np.testing.assert_allclose(resid.mean(axis=0), 0.0, atol=5 * np.sqrt(sv ** 2 / dt / n))


def test_angle_random_walk_reads_off_the_allan_deviation_at_one_second():
    """IEEE Std 952-1997: for angle random walk the Allan deviation has slope -1/2 and N = sigma(1 s)."""
    rng = np.random.default_rng(13)
    sv, fs, n = 0.004 * DEG, 20.0, 200_000  # 0.004 deg/s/sqrt(Hz), 10 000 s of data
    g = _gyro(sv, 0.0)
    beta = gyro_bias_path(g, n, 1 / fs, rng.standard_normal((n, 3)))
    out = gyro_reading_rad_s(g, np.zeros((n, 3)), beta, 1 / fs, rng.standard_normal((n, 3)))
    taus, adev, _, _ = allantools.oadev(out[:, 0], rate=fs, data_type="freq", taus=[1.0, 4.0])
    # spread of these estimates over seeds 13-17: 0.4 % at 1 s, 1.1 % at 4 s; tolerances ~5 sigma
    assert adev[0] == pytest.approx(sv, rel=0.025)
    assert adev[1] == pytest.approx(sv / 2.0, rel=0.05)  # slope -1/2: a factor 2 over a factor 4 in tau


def test_rate_random_walk_reads_off_the_allan_deviation_at_three_seconds():
    """IEEE Std 952-1997: for rate random walk sigma(tau) = K sqrt(tau / 3), so K = sigma(3 s)."""
    rng = np.random.default_rng(14)
    su, fs, n = 1e-4, 10.0, 400_000
    g = _gyro(0.0, su)
    beta = gyro_bias_path(g, n, 1 / fs, rng.standard_normal((n, 3)))
    out = gyro_reading_rad_s(g, np.zeros((n, 3)), beta, 1 / fs, rng.standard_normal((n, 3)))
    _, adev, _, _ = allantools.oadev(out[:, 1], rate=fs, data_type="freq", taus=[3.0])
    assert adev[0] == pytest.approx(su, rel=0.03)  # spread over seeds 13-17: 0.4 %


def test_gyro_output_clips_at_full_scale():
    g = _gyro(0.0, 0.0, full_scale=1.0)
    out = gyro_reading_rad_s(g, np.array([[5.0, -5.0, 0.5]]), np.zeros((2, 3)), 0.1, np.zeros((1, 3)))
    np.testing.assert_array_equal(out, [[1.0, -1.0, 0.5]])


def test_magnetometer_hand_example():
    """b_meas = S (M^T b_body) + bias + K i: with M a -90 deg turn about z, b_body = (1000, 2000,
    3000) nT reads (-2000, 1000, 3000) in the sensor frame; bias (100, -200, 300) nT and 0.1 A in a
    coil of 1000 nT/A along sensor x add up to (-1800, 800, 3300) nT (hand computed)."""
    hw = MagnetometerHardware(M_MAG, np.eye(3), np.array([100.0, -200.0, 300.0]), np.diag([1000.0, 0, 0]),
                              noise_nT=0.0, lsb_nT=0.0, full_scale_nT=1e6)
    out = magnetometer_reading_nT(hw, np.array([[1000.0, 2000.0, 3000.0]]), np.array([[0.1, 0.0, 0.0]]),
                                  np.zeros((1, 3)))
    np.testing.assert_allclose(out, [[-1800.0, 800.0, 3300.0]], rtol=0, atol=1e-9)


def test_magnetometer_quantises_and_clips():
    rng = np.random.default_rng(15)
    hw = draw_magnetometer(rng, M_MAG, noise_nT=100.0, lsb_nT=10.0, full_scale_nT=50_000.0)
    b = rng.normal(0.0, 30_000.0, (2000, 3))
    out = magnetometer_reading_nT(hw, b, rng.uniform(-0.1, 0.1, (2000, 3)), rng.standard_normal((2000, 3)))
    np.testing.assert_allclose(out / 10.0, np.round(out / 10.0), atol=1e-9)  # whole LSBs
    assert np.abs(out).max() == 50_000.0  # some samples hit the full scale and stop there
    clean = magnetometer_reading_nT(hw, b, np.zeros((2000, 3)), np.zeros((2000, 3)))
    inside = np.all(np.abs(clean) < 49_000.0, axis=1)
    # quantisation error of a noise-free reading is at most half an LSB
    exact = b @ M_MAG @ hw.S.T + hw.bias_nT
    assert np.abs(clean[inside] - exact[inside]).max() <= 5.0 + 1e-9


def test_drawn_magnetometer_lies_in_the_stated_ranges():
    rng = np.random.default_rng(16)
    for _ in range(20):
        hw = draw_magnetometer(rng, M_MAG, noise_nT=100.0, lsb_nT=10.0, full_scale_nT=2e5)
        assert np.all((np.abs(hw.bias_nT) >= 300.0) & (np.abs(hw.bias_nT) <= 3000.0))
        np.testing.assert_array_equal(hw.S, hw.S.T)
        assert np.abs(hw.S - np.eye(3)).max() < 0.1
        col = np.linalg.norm(hw.K_nT_per_A, axis=0)
        assert np.all((col >= 800.0) & (col <= 2500.0))
