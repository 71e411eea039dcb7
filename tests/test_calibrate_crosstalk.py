"""The crosstalk's prior and the combination of its estimates (recon.calibrate.prior, recon.calibrate.fusion),
on hand-built numbers."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from recon.calibrate import compare_crosstalk, fuse_crosstalk, prior_sigma_nT_per_A
from recon.calibrate.fusion import (
    MIN_VARIANCE_SHRINK,
    CrosstalkEstimate,
    consistency,
    field_covariance_nT2,
)
from recon.calibrate.prior import HARNESS_nT_per_A, MU0_OVER_4PI_T_m_per_A

NT_PER_T = 1e9


# ---------------------------------------------------------------------------------------- the prior
def test_dipole_field_of_the_prior_against_the_formula():
    # Field of a magnetic dipole m at r (Griffiths, Introduction to Electrodynamics, sec. 5.4,
    # B = mu0/4pi (3 (m.u) u - m) / r^3 (memory)): 1.6 A m^2 at 0.2 m gives 40,000 nT on its axis and
    # 20,000 nT across it; at 0.5 m, 2,560 and 1,280 nT.
    def b_nT(m, r_vec):
        r = np.linalg.norm(r_vec)
        u = r_vec / r
        return MU0_OVER_4PI_T_m_per_A * (3 * (m @ u) * u - m) / r**3 * NT_PER_T

    m = np.array([0.0, 0.0, 1.6])
    assert np.linalg.norm(b_nT(m, np.array([0.0, 0.0, 0.2]))) == pytest.approx(40_000.0, rel=1e-12)
    assert np.linalg.norm(b_nT(m, np.array([0.2, 0.0, 0.0]))) == pytest.approx(20_000.0, rel=1e-12)
    assert np.linalg.norm(b_nT(m, np.array([0.0, 0.5, 0.0]))) == pytest.approx(1_280.0, rel=1e-12)
    # the prior's per-element sigma at one distance is the RMS of one component of that field over
    # random directions (Monte Carlo over 200,000 directions: 0.5 % of the RMS at 2 sigma)
    rng = np.random.default_rng(1)
    u = rng.normal(size=(200_000, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    r = 0.3
    b = MU0_OVER_4PI_T_m_per_A * (3 * (u @ m)[:, None] * u - m) / r**3 * NT_PER_T
    rms_component = float(np.sqrt(np.mean(b**2)))
    coil = np.sqrt(prior_sigma_nT_per_A(np.diag([1.6, 1.6, 1.6]), (r, r))[2] ** 2 - HARNESS_nT_per_A**2)
    assert coil == pytest.approx(rms_component, rel=0.005)


def test_prior_averages_over_the_distance_range():
    # E[r^-6] for r uniform on [0.2, 0.5] m by quadrature against the closed form in the prior
    c = np.diag([1.5, 1.5, 1.1])
    mean_r6 = integrate.quad(lambda r: r**-6, 0.2, 0.5)[0] / 0.3
    expect = np.sqrt(2 / 3) * MU0_OVER_4PI_T_m_per_A * np.array([1.5, 1.5, 1.1]) * np.sqrt(mean_r6) * NT_PER_T
    got = prior_sigma_nT_per_A(c)
    np.testing.assert_allclose(got, np.sqrt(expect**2 + HARNESS_nT_per_A**2), rtol=1e-9)
    assert 5_000 < got[0] < 6_000  # "a few thousand nT/A": 5,560 for 1.5 A m^2/A
    with pytest.raises(ValueError, match="near <= far"):
        prior_sigma_nT_per_A(c, (0.5, 0.2))


# ---------------------------------------------------------------------------------------- combination
K_TRUE = np.array([[1500.0, -200.0, 80.0], [120.0, -900.0, 300.0], [-50.0, 250.0, 2100.0]])
PRIOR = np.full(3, 5000.0)


def test_consistency_of_two_estimates_is_the_difference_test():
    # for two estimates of the same elements, chi2 about their combination equals d^T (Ca + Cb)^-1 d
    rng = np.random.default_rng(3)
    ca, cb = np.diag(rng.uniform(50, 400, 9) ** 2), np.diag(rng.uniform(50, 400, 9) ** 2)
    ka = K_TRUE + rng.normal(0, 300, (3, 3))
    kb = K_TRUE + rng.normal(0, 300, (3, 3))
    both = consistency([CrosstalkEstimate("a", ka, ca), CrosstalkEstimate("b", kb, cb)])
    pair = compare_crosstalk(ka, ca, kb, cb)
    assert both.chi2 == pytest.approx(pair.chi2, rel=1e-9)
    assert both.dof == 9 and both.p_value == pytest.approx(pair.p_value, rel=1e-9)


def test_directions_the_data_do_not_shrink_enough_are_held_at_the_prior():
    # one estimate that gives only coil x's column, to 50 nT/A: three directions shrunk (5000/50)^2 =
    # 10,000 times, six not at all
    cov = np.full((9, 9), np.nan)
    k = np.full((3, 3), np.nan)
    cols = [0, 3, 6]  # row-major positions of K[:, 0]
    cov[np.ix_(cols, cols)] = np.eye(3) * 50.0**2
    k[:, 0] = K_TRUE[:, 0]
    f = fuse_crosstalk([CrosstalkEstimate("step", k, cov)], PRIOR)
    assert f.n_determined == 3
    np.testing.assert_array_equal(f.elements_determined, np.tile([True, False, False], (3, 1)))
    # the posterior mean of a Gaussian pair: k prior^2 / (prior^2 + s^2), 1-sigma 1 / sqrt(1/s^2 + 1/p^2)
    shrink = PRIOR[0] ** 2 / (PRIOR[0] ** 2 + 50.0**2)
    np.testing.assert_allclose(f.crosstalk_nT_per_A[:, 0], shrink * K_TRUE[:, 0], rtol=1e-9)
    np.testing.assert_allclose(f.sigma_nT_per_A[:, 0], 1 / np.sqrt(1 / 50.0**2 + 1 / 5000.0**2), rtol=1e-9)
    np.testing.assert_array_equal(f.crosstalk_nT_per_A[:, 1:], 0.0)  # held at the prior's mean
    np.testing.assert_allclose(f.sigma_nT_per_A[:, 1:], 5000.0)
    assert [d.determined for d in f.directions] == [True] * 3 + [False] * 6
    assert f.directions[0].variance_shrink == pytest.approx(1 + (5000 / 50) ** 2)


def test_shrink_threshold_decides_what_is_determined():
    # sigma 400 nT/A on every element: variance shrunk (5000/400)^2 + 1 = 157 times: determined at the
    # default threshold (100), not at 200
    est = CrosstalkEstimate("synchronous", K_TRUE, np.eye(9) * 400.0**2)
    assert fuse_crosstalk([est], PRIOR).n_determined == 9
    assert fuse_crosstalk([est], PRIOR, min_variance_shrink=200.0).n_determined == 0
    assert MIN_VARIANCE_SHRINK == 100.0


def test_disagreeing_estimates_scale_or_leave_out():
    rng = np.random.default_rng(7)
    good = [CrosstalkEstimate(name, K_TRUE + rng.normal(0, 30, (3, 3)), np.eye(9) * 30.0**2)
            for name in ("step", "synchronous")]
    bad = CrosstalkEstimate("magnitude", K_TRUE + 3000.0, np.eye(9) * 30.0**2)
    # three estimates, one far off: it is left out, the other two combined unscaled
    f3 = fuse_crosstalk([bad, *good], PRIOR)
    assert f3.agreement.agree is False and f3.left_out == "magnitude" and f3.scale_factor == 1.0
    assert np.abs(f3.crosstalk_nT_per_A - K_TRUE).max() < 5 * 30.0 / np.sqrt(2)
    # two that differ, one of them the magnitude fit: the magnitude fit is left out
    f2 = fuse_crosstalk([bad, good[0]], PRIOR)
    assert f2.agreement.agree is False and f2.left_out == "magnitude" and f2.scale_factor == 1.0
    # two gyro-based estimates that differ: no telling which is wrong; sigmas scaled by sqrt(chi2/dof)
    step_bad = CrosstalkEstimate("step", bad.crosstalk_nT_per_A, bad.covariance)
    f2 = fuse_crosstalk([step_bad, good[1]], PRIOR)
    ag = f2.agreement
    assert ag.agree is False and f2.left_out is None
    assert f2.scale_factor == pytest.approx(np.sqrt(ag.chi2 / ag.dof))
    assert ag.p_value == pytest.approx(stats.chi2.sf(ag.chi2, ag.dof))


def test_prior_widens_when_the_data_show_a_large_crosstalk():
    # K of 40,000 nT/A along the coil axes (a magnetometer next to the coils) seen to 100 nT/A in its
    # diagonal only: the geometric prior (5,000) would pull the rest to zero; the most likely prior
    # scale is about the size the data show
    k_big = np.diag([40_000.0, 40_000.0, 30_000.0])
    cov = np.full((9, 9), np.nan)
    k = np.full((3, 3), np.nan)
    diag = [0, 4, 8]
    cov[np.ix_(diag, diag)] = np.eye(3) * 100.0**2
    k.ravel()[diag] = k_big.ravel()[diag]
    f = fuse_crosstalk([CrosstalkEstimate("step", k, cov)], PRIOR)
    # maximum marginal likelihood of s^2 from z_v ~ N(0, s^2 + 1/mu): s^2 = mean(z^2) - mean(1/mu)
    z2 = (np.array([40_000.0, 40_000.0, 30_000.0]) / 5000.0) ** 2
    s = np.sqrt(z2.mean() - (100.0 / 5000.0) ** 2)
    assert f.prior_widening == pytest.approx(s, rel=1e-3)
    np.testing.assert_allclose(np.diag(f.crosstalk_nT_per_A), np.diag(k_big), rtol=1e-3)
    # a crosstalk of the prior's size or less leaves the prior alone
    small = fuse_crosstalk([CrosstalkEstimate("step", K_TRUE, np.eye(9) * 100.0**2)], PRIOR)
    assert small.prior_widening == 1.0


def test_field_covariance_at_the_currents():
    # K i with i = (0.1, 0, -0.2) A: axis a sees K[a, 0] 0.1 - K[a, 2] 0.2; with independent elements
    # of variance v the variance is v (0.01 + 0.04) on each axis and the axes are independent
    v = np.arange(1.0, 10.0) * 100.0
    cov = field_covariance_nT2(np.diag(v), np.array([[0.1, 0.0, -0.2], [0.0, 0.0, 0.0]]))
    want = np.diag([v[0] * 0.01 + v[2] * 0.04, v[3] * 0.01 + v[5] * 0.04, v[6] * 0.01 + v[8] * 0.04])
    np.testing.assert_allclose(cov[0], want, rtol=1e-12)
    np.testing.assert_array_equal(cov[1], 0.0)
