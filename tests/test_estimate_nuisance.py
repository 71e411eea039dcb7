"""The estimator's nuisance models on hand-made data with known answers: the rate through clipped gyro
runs (a smoother on the rate with Euler's equations), and the maximum-likelihood level of the unmodelled field."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from recon.estimate import rate_smoother
from recon.estimate.clipping import reconstruct_clipped
from recon.estimate.field_noise import SIGMA_BOUNDS_nT, fit_field_noise
from recon.estimate.rate_smoother import smooth_clipped_rate

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


def _tumble(scale: float, t: np.ndarray, w0: np.ndarray, b0_T: np.ndarray, gain: float):
    """Rate, body-frame field and coil dipole of a tumbling body under B-dot (``m = gain w x b``, up to
    0.2 A m^2 per axis), whose coils' torque is ``scale`` times the nominal ``m x b`` (the field fixed in
    inertial space: db/dt = -w x b), by scipy's RK45 at tight tolerance."""
    jinv = np.linalg.inv(J)

    def dipole(w, b):
        return np.clip(gain * np.cross(w, b), -0.2, 0.2)

    def f(_t, y):
        w, b = y[:3], y[3:]
        return np.r_[jinv @ (scale * np.cross(dipole(w, b), b) - np.cross(w, J @ w)), -np.cross(w, b)]

    sol = solve_ivp(f, (t[0], t[-1]), np.r_[w0, b0_T], t_eval=t, rtol=1e-11, atol=1e-15, method="RK45")
    w, b = sol.y.T[:, :3], sol.y.T[:, 3:]
    return w, b, np.array([dipole(wk, bk) for wk, bk in zip(w, b, strict=True)])


def _clipped_pass(scale: float, seed: int = 3, w0=(0.3, -0.2, 0.5), duration_s: float = 90.0, gain: float = 2e4):
    """A tumble under B-dot, gyro at 20 Hz with a bias and white noise, its z axis clipped at the 60th
    percentile of the rate about it; magnetometer at 10 Hz with 100 nT noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, duration_s, 0.05)
    w, b_T, m = _tumble(scale, t, np.asarray(w0, float), np.array([20e-6, -15e-6, 30e-6]), gain)
    bias = np.radians([0.3, -0.2, 0.25])
    arw = 1e-4  # rad/sqrt(s)
    logged = w + bias + rng.normal(0.0, arw / np.sqrt(0.05), w.shape)
    fs = float(np.percentile(np.abs(logged[:, 2]), 60))
    clipped = np.zeros(logged.shape, bool)
    clipped[:, 2] = np.abs(logged[:, 2]) >= fs
    logged[clipped[:, 2], 2] = np.sign(logged[clipped[:, 2], 2]) * fs
    mag = slice(None, None, 2)
    b_meas = b_T[mag] * 1e9 + rng.normal(0.0, 100.0, b_T[mag].shape)
    return dict(t=t, w=w, bias=bias, logged=logged, clipped=clipped, fs=fs, t_mag=t[mag], b_nT=b_meas, m=m, arw=arw,
                b_true_nT=b_T * 1e9)


@pytest.mark.parametrize("scale", [1.0, 1.10])
def test_clipped_axis_is_recovered_through_a_tumble(scale):
    """A 25-35 deg/s tumble, the z axis at full scale 40 % of the time, the coils' torque right or 10 %
    off the nominal: the solved rate is within a few hundredths of a deg/s, against the deg/s that
    holding the bound gives."""
    p = _clipped_pass(scale)
    rec = reconstruct_clipped(p["t"], p["logged"], p["clipped"], np.eye(3), p["fs"], p["t_mag"], p["b_nT"], 100.0,
                              p["arw"], 1e-3, inertia_kg_m2=J, m_body_Am2=p["m"])
    c = p["clipped"].any(axis=1)
    err = np.degrees(rec.w_body_rad_s[c] - p["bias"] - p["w"][c])
    held = np.degrees(p["logged"][c] - p["bias"] - p["w"][c])
    rms, rms_held = np.sqrt(np.mean(err[:, 2] ** 2)), np.sqrt(np.mean(held[:, 2] ** 2))
    assert rms_held > 0.5  # deg/s: the bound alone is far off
    assert rms < 0.05, (rms, rms_held)
    # the unclipped axes are the gyro's own
    assert np.array_equal(rec.w_body_rad_s[:, :2], p["logged"][:, :2])


def _smoothed_slow_spin(torque_sigma: float, monkeypatch):
    """A 300 s spin at 10 down to 5 deg/s about z under B-dot, the coils' torque 10 % above the nominal,
    z clipped 40 % of the time; the field's slope given with its noise only (50 nT/s, one a second)."""
    monkeypatch.setattr(rate_smoother, "TORQUE_REL_SIGMA", torque_sigma)
    p = _clipped_pass(1.10, seed=5, w0=(0.01, 0.02, 0.17), duration_s=300.0, gain=3e5)
    t, w, b_nT, rng = p["t"], p["w"], p["b_true_nT"], np.random.default_rng(6)
    # the field fixed in inertial space: db/dt = -w x b, so [b x] w = db/dt
    constraints = {g: (_cross(b_nT[g]), np.cross(b_nT[g], w[g]) + rng.normal(0.0, 50.0, 3))
                   for g in range(0, len(t), 20)}
    rate = smooth_clipped_rate(t, p["logged"], p["clipped"], np.eye(3), p["arw"] ** 2 / 0.05, constraints, 50.0 ** 2,
                               J, p["m"], b_nT)
    c = p["clipped"].any(axis=1)
    return p, rate, rate.w_rad_s[c] - w[c], c


def test_rate_smoother_estimates_the_torque_scale_where_it_matters(monkeypatch):
    """Through a slow clipped spin the coils' torque decides the rate about the spin axis: estimating
    its scale brings the scale toward the truth (+0.10) and cuts the rate error, which a torque taken
    as exact leaves nearly twice as large and several times its stated sigma."""
    p, rate, err, c = _smoothed_slow_spin(0.05, monkeypatch)
    (s, s_sig), = rate.torque_scale
    assert s_sig < 0.5 * 0.05 and s > 2.0 * s_sig and abs(s - 0.10) < 3.0 * s_sig
    _, _, err_fixed, _ = _smoothed_slow_spin(1e-6, monkeypatch)
    rms, rms_fixed = (float(np.degrees(np.sqrt(np.mean(e[:, 2] ** 2)))) for e in (err, err_fixed))
    assert rms < 0.03 and rms_fixed > 1.5 * rms, (rms, rms_fixed)  # deg/s
    z2 = np.einsum("ni,nij,nj->n", err, np.linalg.inv(rate.cov[c]), err)
    assert np.mean(z2) / 3.0 < 3.0  # NEES per axis (correlated in time: a loose bound)
    # the gyro's bias on the unclipped axes comes out with the rate
    assert np.all(np.abs(np.degrees(rate.bias_rad_s[c][:, :2] - p["bias"][:2])) < 0.03)


def _cross(v):
    return np.array([[0.0, -v[2], v[1]], [v[2], 0.0, -v[0]], [-v[1], v[0], 0.0]])


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
