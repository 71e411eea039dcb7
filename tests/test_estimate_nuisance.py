"""The estimator's nuisance models on hand-made data with known answers: the rate through clipped gyro
runs from Euler's equations, and the maximum-likelihood level of the unmodelled field."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from recon.estimate.euler_prior import euler_prior
from recon.estimate.field_noise import SIGMA_BOUNDS_nT, fit_field_noise

# an asymmetric small-satellite inertia (kg m^2), off-diagonal terms included (our own)
J = np.array([[0.060, 0.002, -0.001], [0.002, 0.080, 0.003], [-0.001, 0.003, 0.030]])


def _truth(t, w0, m_Am2, b_T):
    """Euler's equations with a constant coil dipole in a constant field, by scipy's adaptive RK45 at
    tight tolerance (the reference the RK4 propagation must meet)."""
    jinv = np.linalg.inv(J)

    def f(_t, w):
        return jinv @ (np.cross(m_Am2, b_T) - np.cross(w, J @ w))

    sol = solve_ivp(f, (t[0], t[-1]), w0, t_eval=t, rtol=1e-11, atol=1e-13, method="RK45")
    return sol.y.T


@pytest.mark.parametrize("m_Am2", [np.zeros(3), np.array([0.2, -0.1, 0.15])])
def test_euler_prior_follows_the_body_through_a_clipped_run(m_Am2):
    b_T = np.array([20e-6, -15e-6, 30e-6])
    t = np.arange(0.0, 60.0, 0.1)
    w = _truth(t, np.array([0.3, -0.2, 0.6]), m_Am2, b_T)  # rad/s: a fast tumble with nutation
    clipped = (t > 20.0) & (t < 35.0)
    prior, cov = euler_prior(t, w, clipped, J, np.tile(m_Am2, (len(t), 1)), np.tile(b_T * 1e9, (len(t), 1)),
                             start_var=1e-10)
    err = prior[clipped] - w[clipped]
    # with the exact inertia and torque, the propagation's own error (RK4 at 0.1 s) is tiny
    assert np.abs(err).max() < 1e-5  # rad/s
    assert np.all(prior[~clipped] == 0.0)
    # the stated covariance is the spread from a 5 % inertia error etc.: positive, and it grows into
    # the run from each end (largest in the middle)
    sig = np.sqrt(np.einsum("nii->ni", cov[clipped]))
    assert np.all(sig > 0)
    mid = len(sig) // 2
    assert sig[mid].max() > sig[0].max() and sig[mid].max() > sig[-1].max()


def test_euler_prior_covers_an_inertia_error():
    """The nominal inertia 5 % off on one principal axis: the error stays within the stated sigmas
    (the model's 1-sigma is 5 % per moment)."""
    t = np.arange(0.0, 40.0, 0.1)
    w = _truth(t, np.array([0.4, 0.1, -0.5]), np.zeros(3), np.zeros(3))
    vals, vecs = np.linalg.eigh(J)
    j_wrong = vecs @ np.diag(vals * np.array([1.05, 1.0, 1.0])) @ vecs.T
    clipped = (t > 10.0) & (t < 30.0)
    prior, cov = euler_prior(t, w, clipped, j_wrong, np.zeros((len(t), 3)), np.zeros((len(t), 3)), 1e-10)
    err = prior[clipped] - w[clipped]
    z2 = np.einsum("ni,nij,nj->n", err, np.linalg.inv(cov[clipped]), err)
    assert np.abs(err).max() > 1e-4  # the wrong inertia does show
    assert np.sqrt(z2).max() < 3.0


def test_euler_prior_one_sided_and_unbounded_runs():
    t = np.arange(0.0, 10.0, 0.1)
    w = _truth(t, np.array([0.2, 0.1, -0.3]), np.zeros(3), np.zeros(3))
    to_end = t > 7.0  # runs to the log's end: propagated forward only
    prior, cov = euler_prior(t, w, to_end, J, np.zeros((len(t), 3)), np.zeros((len(t), 3)), 1e-10)
    assert np.abs(prior[to_end] - w[to_end]).max() < 1e-5
    everything = np.ones(len(t), bool)  # nothing unclipped: no information
    prior, cov = euler_prior(t, w, everything, J, np.zeros((len(t), 3)), np.zeros((len(t), 3)), 1e-10)
    assert np.all(np.isinf(np.einsum("nii->ni", cov)))


def _gaussian_neg2_log_l(x):
    """-2 log L of zero-mean Gaussian samples with vector rms sigma (per axis sigma / sqrt 3), the
    correlation time not entering (a flat ridge along tau)."""
    n = x.size
    ss = float(np.sum(x ** 2))

    def f(sigma, _tau):
        var = sigma ** 2 / 3.0
        return ss / var + n * np.log(var)

    return f


def test_field_level_is_the_maximum_likelihood_with_its_profile_interval():
    rng = np.random.default_rng(7)
    sigma_true = 400.0
    x = rng.normal(0.0, sigma_true / np.sqrt(3.0), (60, 3))
    fit = fit_field_noise(_gaussian_neg2_log_l(x), given_nT=100.0, given_tau_s=500.0)
    # closed form: the ML variance per axis is the mean square (textbook Gaussian ML)
    s_hat = float(np.sqrt(3.0 * np.mean(x ** 2)))
    assert fit.fitted_nT == pytest.approx(s_hat, rel=0.03)
    assert fit.sigma_nT == fit.fitted_nT  # above the given level: the fit stands
    assert fit.gain > 0
    # the +1 profile interval solved directly: n (r - 1 - ln r) = 1 with r = s_hat^2 / s^2
    n = x.size
    g = lambda s: n * ((s_hat / s) ** 2 - 1.0 - np.log((s_hat / s) ** 2)) - 1.0  # noqa: E731
    lo, hi = brentq(g, 1.0, s_hat), brentq(g, s_hat, 1e4)
    assert fit.interval_nT[0] == pytest.approx(lo, rel=0.03)
    assert fit.interval_nT[1] == pytest.approx(hi, rel=0.03)


def test_field_level_interval_covers_the_truth_two_times_in_three():
    """A 68 % interval (Wilks: -2 log L within 1 of its minimum) holds the true level in about 68 % of
    draws; 200 draws give a binomial sigma of 3.3 %."""
    rng = np.random.default_rng(9)
    hits = 0
    for _ in range(200):
        x = rng.normal(0.0, 400.0 / np.sqrt(3.0), (60, 3))
        lo, hi = fit_field_noise(_gaussian_neg2_log_l(x), given_nT=100.0, given_tau_s=500.0).interval_nT
        hits += lo < 400.0 < hi
    assert 0.58 < hits / 200 < 0.78


def test_field_level_never_goes_below_the_given_level():
    rng = np.random.default_rng(8)
    x = rng.normal(0.0, 60.0 / np.sqrt(3.0), (200, 3))
    fit = fit_field_noise(_gaussian_neg2_log_l(x), given_nT=150.0, given_tau_s=500.0, interval=False)
    assert fit.fitted_nT < 100.0  # the likelihood wants less ...
    assert fit.sigma_nT == 150.0  # ... the model's stated accuracy is kept as the floor
    assert np.isnan(fit.interval_nT[0])
    assert SIGMA_BOUNDS_nT[0] <= fit.fitted_nT <= SIGMA_BOUNDS_nT[1]
    # the drift rate sigma^2 / tau is not lowered either: the likelihood here is flat in tau, so it
    # picks a ladder value; the one used keeps 150^2 / tau at least 150^2 / 500
    assert fit.tau_s <= 500.0


def test_field_level_raised_keeps_the_drift_rate_of_the_given_model():
    rng = np.random.default_rng(10)
    x = rng.normal(0.0, 300.0 / np.sqrt(3.0), (200, 3))
    fit = fit_field_noise(_gaussian_neg2_log_l(x), given_nT=100.0, given_tau_s=100.0, interval=False)
    assert fit.sigma_nT > 250.0
    assert fit.sigma_nT ** 2 / fit.tau_s >= 100.0 ** 2 / 100.0 * (1 - 1e-12)
